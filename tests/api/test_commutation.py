"""The life table at a rate: commutation columns, expectations of life, CSV."""

import csv
import io
import math

import numpy as np
import pytest
from scipy import integrate

from service.engine.lifetable import life_table_columns
from tests.api.problem import assert_problem
from tests.reference import models
from tests.reference.direct import DirectLife

URL = "/v1/bases/{}/life-table"


def table(client, ref="standard-ultimate", **query):
    response = client.get(URL.format(ref), query_string={"columns": "commutation"} | query)
    assert response.status_code == 200, response.get_data(as_text=True)
    return {row["age"]: row for row in response.get_json()["rows"]}


def factor(client, age, rate=None, **item):
    body = {"basis": "standard-ultimate",
            "items": [{"lives": [{"age": age}], "timing": "advance"} | item]}
    if rate is not None:
        body["interest_rate"] = rate
    response = client.post("/v1/annuity-factors", json=body)
    assert response.status_code == 200, response.get_data(as_text=True)
    return response.get_json()["results"][0]["value"]


# Dickson, Hardy and Waters, AMLCR, Standard Ultimate Survival Model tables at 5% (recalled
# from memory): a-due and A.
PUBLISHED = {20: (19.9664, 0.04922), 40: (18.4578, 0.12106), 60: (14.9041, 0.29028),
             65: (13.5498, 0.35477)}


@pytest.mark.parametrize("age", sorted(PUBLISHED))
def test_n_over_d_and_m_over_d_are_the_published_values(client, age):
    row = table(client, from_age=age, to_age=age)[age]
    a_due, insurance = PUBLISHED[age]
    # Bowers et al., Actuarial Mathematics, commutation functions: a-due = N/D, A = M/D.
    assert row["N"] / row["D"] == pytest.approx(a_due, abs=5e-5)
    assert row["M"] / row["D"] == pytest.approx(insurance, abs=5e-6)
    assert row["a_due"] == row["N"] / row["D"]


@pytest.mark.parametrize("rate", (None, 0.0, 0.03, 0.08))
def test_n_over_d_is_the_service_factor(client, rate):
    query = {} if rate is None else {"interest_rate": rate}
    rows = table(client, from_age=30, to_age=100, **query)
    for age in (30, 55, 80, 100):
        assert rows[age]["a_due"] == pytest.approx(factor(client, age, rate), rel=1e-12)
        # Common practice: A = 1 - d a-due.
        i = 0.05 if rate is None else rate
        assert rows[age]["M"] / rows[age]["D"] == pytest.approx(
            1 - i / (1 + i) * rows[age]["a_due"], rel=1e-11, abs=1e-14)


def test_increasing_forms_from_s_and_r(client):
    rows = table(client, from_age=60, to_age=60)
    q = models.susm().q[60 - 20:]
    alive = np.concatenate([[1.0], np.cumprod(1 - q)[:-1]])
    k = np.arange(q.size)
    v = 1 / 1.05
    # Definitions (any life-contingencies text): (I a-due)_x = sum (k+1) v^k kp_x and
    # (IA)_x = sum (k+1) v^(k+1) kp_x q_(x+k); by commutation S/D and R/D.
    increasing_annuity = np.sum((k + 1) * v**k * alive)
    increasing_insurance = np.sum((k + 1) * v ** (k + 1) * alive * q)
    assert rows[60]["S"] / rows[60]["D"] == pytest.approx(increasing_annuity, rel=1e-12)
    assert rows[60]["R"] / rows[60]["D"] == pytest.approx(increasing_insurance, rel=1e-12)


def test_d_is_v_to_the_age_times_l(client):
    rows = table(client, from_age=70, to_age=71, interest_rate=0.04)
    for age, row in rows.items():
        assert row["D"] == pytest.approx(1.04**-age * row["l"], rel=1e-13)
        assert row["C"] == pytest.approx(1.04 ** -(age + 1) * row["d"], rel=1e-13)
    assert rows[70]["N"] - rows[71]["N"] == pytest.approx(rows[70]["D"], rel=1e-12)


def test_complete_expectation_is_curtate_plus_a_half_under_udd(client):
    # Under UDD e-complete = e + 1/2 (Bowers et al., Actuarial Mathematics, life tables).
    rows = table(client, from_age=20)
    for row in rows.values():
        assert row["e_complete"] == pytest.approx(row["e"] + 0.5, rel=1e-12)


@pytest.mark.parametrize("assumption", ("constant-force", "balducci"))
def test_complete_expectation_by_quadrature(assumption):
    tab = models.susm_short()
    cols = life_table_columns(tab, 90, assumption=assumption)
    life = DirectLife.of(tab.q, tab.first_age, 90.0, assumption)
    # The definition: the integral of tp over t, by scipy quad year by year.
    expected = sum(integrate.quad(life.survival, k, k + 1, epsabs=1e-14, epsrel=1e-13)[0]
                   for k in range(math.ceil(life.horizon)))
    assert cols.e_complete[0] == pytest.approx(expected, rel=1e-10)


def test_csv_carries_the_same_rows(client):
    response = client.get(URL.format("standard-ultimate"), headers={"Accept": "text/csv"},
                          query_string={"columns": "commutation", "from_age": 65,
                                        "to_age": 67})
    assert response.status_code == 200
    assert response.mimetype == "text/csv"
    assert response.headers["X-Radix-Age"] == "20"
    assert response.headers["X-Interest-Rate"] == "0.05"
    rows = list(csv.DictReader(io.StringIO(response.get_data(as_text=True))))
    assert [r["age"] for r in rows] == ["65", "66", "67"]
    assert float(rows[0]["a_due"]) == table(client, from_age=65, to_age=65)[65]["a_due"]


def test_an_accept_it_cannot_produce_is_406(client):
    assert_problem(client.get(URL.format("standard-ultimate"),
                              headers={"Accept": "application/xml"}), 406)


def test_basic_columns_carry_no_commutation(client):
    response = client.get(URL.format("standard-ultimate"), query_string={"from_age": 65,
                                                                         "to_age": 65})
    row = response.get_json()["rows"][0]
    assert "D" not in row and "e_complete" in row
