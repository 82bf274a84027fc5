"""POST /v1/cash-flow-schedules: rows, totals against the factor, CSV, and two lives."""

import csv
import io
import math
import shutil

import numpy as np
import pytest

from service import create_app
from service.app import DEFAULT_TABLES
from tests.api.problem import assert_problem

URL = "/v1/cash-flow-schedules"
COLUMNS = ["time", "payment", "probability", "discount", "present_value"]
STATES = ["both_alive", "first_only", "second_only"]


def schedule(client, basis, item, **extra):
    response = client.post(URL, json={"basis": basis, "item": item} | extra)
    assert response.status_code == 200, response.get_data(as_text=True)
    return response.get_json()


def factor(client, basis, item, **extra):
    response = client.post("/v1/annuity-factors",
                           json={"basis": basis, "items": [item]} | extra)
    assert response.status_code == 200, response.get_data(as_text=True)
    return response.get_json()["results"][0]


def col(body, name) -> np.ndarray:
    return np.array([row[name] for row in body["rows"]], dtype=float)


CASES = {
    "advance": {"lives": [{"age": 65}], "timing": "advance"},
    "arrears": {"lives": [{"age": 65}], "timing": "arrears"},
    "monthly advance": {"lives": [{"age": 65.25}], "timing": "advance", "frequency": 12},
    "monthly arrears": {"lives": [{"age": 65.25}], "timing": "arrears", "frequency": 12},
    "continuous": {"lives": [{"age": 65.5}], "timing": "continuous"},
    "term": {"lives": [{"age": 65}], "timing": "advance", "term": 10},
    "deferral": {"lives": [{"age": 55}], "timing": "advance", "deferral": 10},
    "guarantee": {"lives": [{"age": 65}], "timing": "advance", "frequency": 12,
                  "guarantee": 5},
    "escalation": {"lives": [{"age": 65}], "timing": "advance", "frequency": 4,
                   "escalation": 0.03},
    "continuous deferred term guarantee escalation": {
        "lives": [{"age": 55.5}], "timing": "continuous", "deferral": 10.25, "term": 15.5,
        "guarantee": 5, "escalation": 0.02},
    "two lives last survivor": {"lives": [{"age": 65}, {"age": 62}], "timing": "advance",
                                "frequency": 12, "survivorship": "last-survivor"},
    "two lives two-thirds": {"lives": [{"age": 65}, {"age": 62}], "timing": "arrears",
                             "frequency": 2, "survivorship": {"both": 1, "first_only": 1,
                                                              "second_only": 0.6667}},
    "two lives joint continuous": {"lives": [{"age": 65}, {"age": 62}],
                                   "timing": "continuous", "survivorship": "joint-life"},
    "two lives reversionary guaranteed": {"lives": [{"age": 70}, {"age": 66}],
                                          "timing": "advance", "guarantee": 3,
                                          "survivorship": "reversionary"},
}

#: Bases whose m-thly method is exact, so that the schedule and the factor must agree.
EXACT_BASES = {"standard-ultimate": None, "standard-select": None,
               "fernhollow-annuitants@2026.1": "female"}


def with_sex(item, sex):
    if sex is None:
        return item
    sexes = [sex, "male"]
    return item | {"lives": [life | {"sex": sexes[k]} for k, life in enumerate(item["lives"])]}


@pytest.mark.parametrize("basis, sex", EXACT_BASES.items(), ids=list(EXACT_BASES))
@pytest.mark.parametrize("name", list(CASES))
def test_total_equals_factor_times_amount(client, basis, sex, name):
    item = with_sex(CASES[name], sex)
    amount = 1234.5
    body = schedule(client, basis, item, amount=amount)
    result = factor(client, basis, item)
    assert body["totals"]["amount"] == pytest.approx(amount, rel=0, abs=0)
    assert body["totals"]["present_value"] == pytest.approx(result["value"] * amount,
                                                            rel=1e-10)
    assert body["totals"]["factor"] == pytest.approx(result["value"], rel=1e-10)
    assert body["method"] == result["method"]
    # Each row's present value is the product of its parts, and the rows add to the total.
    np.testing.assert_allclose(
        col(body, "present_value"),
        col(body, "payment") * col(body, "probability") * col(body, "discount"),
        rtol=1e-12, atol=1e-15 * amount)
    assert col(body, "present_value").sum() == pytest.approx(body["totals"]["present_value"],
                                                             rel=1e-12)
    assert np.all(np.diff(col(body, "time")) > 0)
    probability = col(body, "probability")
    assert ((probability >= 0) & (probability <= 1 + 1e-12)).all()


@pytest.mark.parametrize("name", ["advance", "arrears", "monthly advance", "deferral",
                                  "escalation", "two lives last survivor"])
def test_discrete_discount_is_one_over_one_plus_i_to_the_time(client, name):
    # Common practice: v^t = (1 + i)^-t for a flat effective annual rate i.
    body = schedule(client, "standard-ultimate", CASES[name])
    np.testing.assert_allclose(col(body, "discount"), 1.05 ** -col(body, "time"),
                               rtol=1e-13, atol=0)
    body = schedule(client, "standard-ultimate", CASES[name], interest_rate=0.03)
    np.testing.assert_allclose(col(body, "discount"), 1.03 ** -col(body, "time"),
                               rtol=1e-13, atol=0)
    assert body["audit"]["interest"]["source"] == "request"


def test_annual_survival_follows_the_published_law(client):
    # Source: Dickson, Hardy and Waters, Actuarial Mathematics for Life Contingent Risks,
    # Standard Ultimate Survival Model: Makeham A = 0.00022, B = 2.7e-6, c = 1.124, so
    # tp(x) = exp(-A t - B c^x (c^t - 1) / ln c) at whole t.
    body = schedule(client, "standard-ultimate", CASES["advance"])
    t = col(body, "time")
    a, b, c, x = 0.00022, 2.7e-6, 1.124, 65
    expected = np.exp(-a * t - b * c**x * (c**t - 1) / math.log(c))
    whole = t <= 130 - x  # beyond the table's last age the table closes with q = 1
    np.testing.assert_allclose(col(body, "probability")[whole], expected[whole],
                               rtol=1e-10, atol=1e-15)


def test_amount_scales_payments_not_probabilities(client):
    one = schedule(client, "standard-ultimate", CASES["escalation"])
    many = schedule(client, "standard-ultimate", CASES["escalation"], amount=2500)
    np.testing.assert_allclose(col(many, "payment"), 2500 * col(one, "payment"), rtol=1e-15)
    np.testing.assert_allclose(col(many, "probability"), col(one, "probability"), rtol=0)
    np.testing.assert_allclose(col(many, "discount"), col(one, "discount"), rtol=0)
    # Escalation: quarterly payments of 1/4, rising by 3% at each whole year (common practice).
    np.testing.assert_allclose(col(one, "payment"),
                               0.25 * 1.03 ** np.floor(col(one, "time") + 1e-9), rtol=1e-12)


def test_hundred_year_monthly_schedule_has_1200_rows(client):
    item = {"lives": [{"age": 20}], "timing": "advance", "frequency": 12, "term": 100}
    body = schedule(client, "standard-ultimate", item)
    assert len(body["rows"]) == 1200
    np.testing.assert_allclose(col(body, "time"), np.arange(1200) / 12, rtol=0, atol=1e-12)
    np.testing.assert_allclose(col(body, "payment"), 1 / 12, rtol=1e-15)


# ---- two lives ------------------------------------------------------------------------------


def single_life_survival(client, basis, life, item, times) -> np.ndarray:
    """Probability that ``life`` alone is alive at ``times``, from its own schedule."""
    alone = {k: v for k, v in item.items() if k not in ("lives", "survivorship", "guarantee")}
    body = schedule(client, basis, alone | {"lives": [life]})
    by_time = dict(zip(np.round(col(body, "time"), 9), col(body, "probability"), strict=True))
    return np.array([by_time.get(round(t, 9), 0.0) for t in times])


@pytest.mark.parametrize("basis, sex", [("standard-ultimate", None),
                                        ("fernhollow-annuitants@2026.1", "female")])
@pytest.mark.parametrize("name", ["two lives last survivor", "two lives two-thirds"])
def test_two_life_states_with_both_dead_sum_to_one(client, basis, sex, name):
    item = with_sex(CASES[name], sex)
    body = schedule(client, basis, item)
    t = col(body, "time")
    both, first, second = (col(body, s) for s in STATES)
    p1 = single_life_survival(client, basis, item["lives"][0], item, t)
    p2 = single_life_survival(client, basis, item["lives"][1], item, t)
    # Independent lives (common practice): the four states partition the outcomes.
    both_dead = (1 - p1) * (1 - p2)
    np.testing.assert_allclose(both + first + second + both_dead, 1.0, rtol=0, atol=1e-12)
    np.testing.assert_allclose(both, p1 * p2, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(first, p1 * (1 - p2), rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(second, (1 - p1) * p2, rtol=1e-12, atol=1e-15)
    amounts = item["survivorship"]
    if amounts == "last-survivor":
        amounts = {"both": 1, "first_only": 1, "second_only": 1}
    np.testing.assert_allclose(
        col(body, "probability"),
        amounts["both"] * both + amounts["first_only"] * first
        + amounts["second_only"] * second, rtol=1e-12, atol=1e-15)


def test_single_life_rows_carry_no_two_life_states(client):
    body = schedule(client, "standard-ultimate", CASES["advance"])
    assert set(body["rows"][0]) == set(COLUMNS)


# ---- CSV ------------------------------------------------------------------------------------


@pytest.mark.parametrize("name", ["monthly advance", "two lives two-thirds", "continuous"])
def test_csv_rows_match_the_json_rows(client, name):
    item = CASES[name]
    body = schedule(client, "standard-ultimate", item, amount=100)
    response = client.post(URL, json={"basis": "standard-ultimate", "item": item,
                                      "amount": 100}, headers={"Accept": "text/csv"})
    assert response.status_code == 200
    assert response.mimetype == "text/csv"
    lines = response.get_data(as_text=True).splitlines()
    records = list(csv.reader(io.StringIO(response.get_data(as_text=True))))
    expected_header = COLUMNS + (STATES if len(item["lives"]) == 2 else [])
    assert records[0] == expected_header
    assert len(lines) == len(records) == len(body["rows"]) + 1
    for record, row in zip(records[1:], body["rows"], strict=True):
        assert [float(v) for v in record] == [row[k] for k in expected_header]
    listed = {(b["id"], b["default"]): b for b in client.get("/v1/bases").get_json()["bases"]}
    entry = listed[("standard-ultimate", True)]
    assert response.headers["X-Basis-Id"] == entry["id"]
    assert response.headers["X-Basis-Version"] == entry["version"]
    assert response.headers["X-Basis-Digest"] == entry["digest"]
    assert response.headers["X-Request-ID"]


def test_csv_error_is_still_a_problem(client):
    response = client.post(URL, json={"basis": "standard-ultimate",
                                      "item": {"lives": [{"age": 140}], "timing": "advance"}},
                           headers={"Accept": "text/csv"})
    assert_problem(response, 422, "item.lives.0.age")


# ---- Woolhouse bases ------------------------------------------------------------------------


MONTHLY = {"lives": [{"age": 65, "sex": "male"}], "timing": "advance", "frequency": 12}


def test_schedule_is_exact_even_on_a_woolhouse_basis(client):
    result = factor(client, "fernhollow-annuitants@2025.1", MONTHLY)
    body = schedule(client, "fernhollow-annuitants@2025.1", MONTHLY)
    assert result["method"]["approximation"] == "woolhouse-2"
    assert body["method"]["approximation"] == "exact"
    # The two methods differ, so the schedule does not merely repeat the factor.
    assert body["totals"]["factor"] != pytest.approx(result["value"], rel=1e-6)


def test_woolhouse_basis_schedule_equals_the_exact_factor(tmp_path):
    # The shipped Woolhouse basis beside a copy of it that values m-thly payments exactly.
    shutil.copytree(DEFAULT_TABLES / "data", tmp_path / "data")
    shipped = DEFAULT_TABLES / "fernhollow-annuitants-2025.1.toml"
    shutil.copy(shipped, tmp_path / "woolhouse.toml")
    text = shipped.read_text(encoding="utf-8")
    assert 'mthly = "woolhouse-2"' in text and 'version = "2025.1"' in text
    lines = [line for line in text.splitlines() if not line.startswith("digest")]
    # The twin is a demo copy of the retired version (a retired file must record a digest).
    lines = [line.replace('status = "retired"', 'status = "demo"') for line in lines]
    exact = ("\n".join(lines).replace('mthly = "woolhouse-2"', 'mthly = "exact"')
             .replace('version = "2025.1"', 'version = "2025.1-exact"'))
    (tmp_path / "exact.toml").write_text(exact + "\n", encoding="utf-8")
    app = create_app({"TESTING": True, "TABLES_DIR": str(tmp_path)})
    assert app.extensions["registry"].refused == ()
    client = app.test_client()
    body = schedule(client, "fernhollow-annuitants@2025.1", MONTHLY)
    exact_value = factor(client, "fernhollow-annuitants@2025.1-exact", MONTHLY)
    assert exact_value["method"]["approximation"] == "exact"
    assert body["totals"]["factor"] == pytest.approx(exact_value["value"], rel=1e-10)


# ---- errors ---------------------------------------------------------------------------------


@pytest.mark.parametrize("body, status, path", [
    ({"basis": "standard-ultimate", "item": {"lives": [{"age": 131}], "timing": "advance"}},
     422, "item.lives.0.age"),
    ({"basis": "standard-ultimate", "item": {"lives": [{"age": 65}], "timing": "advance",
                                             "term": 5, "guarantee": 10}}, 422,
     "item.guarantee"),
    ({"basis": "standard-ultimate", "item": {"lives": [{"age": 65}], "timing": "advance",
                                             "frequency": 12, "term": 10.05}}, 422,
     "item.term"),
    ({"basis": "fernhollow-annuitants", "item": {"lives": [{"age": 65}],
                                                 "timing": "advance"}}, 422,
     "item.lives.0.sex"),
    ({"basis": "standard-ultimate", "item": {"lives": [{"age": 65}], "timing": "advance"},
      "amount": "100"}, 422, "amount"),
    ({"basis": "standard-ultimate", "item": {"lives": [{"age": 65}], "timing": "advance"},
      "amount": True}, 422, "amount"),
    ({"basis": "standard-ultimate", "items": [{"lives": [{"age": 65}],
                                               "timing": "advance"}]}, 422, "items"),
    ({"basis": "no-such-basis", "item": {"lives": [{"age": 65}], "timing": "advance"}}, 404,
     None),
])
def test_invalid_schedule_requests_are_refused(client, body, status, path):
    assert_problem(client.post(URL, json=body), status, path)


def test_schedule_wants_json(client):
    response = client.post(URL, data="basis=standard-ultimate",
                           content_type="application/x-www-form-urlencoded")
    assert_problem(response, 415)
