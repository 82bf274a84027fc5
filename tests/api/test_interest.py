"""Interest structures and sensitivities through HTTP."""

import csv
import io
import json
import math

import numpy as np
import pytest

from service.engine.annuity import Item, Life, Payments, Valuation, annuity_values
from service.engine.curves import Curve
from tests.api.problem import assert_problem
from tests.reference import models

URL = "/v1/annuity-factors"
SPOT = {"kind": "spot", "terms": [1, 5, 10, 30], "rates": [0.031, 0.036, 0.04, 0.042]}
ITEM = {"lives": [{"age": 65}], "timing": "advance", "frequency": 12}


def post(client, body, status=200):
    response = client.post(URL, json=body)
    assert response.status_code == status, response.get_data(as_text=True)
    return response.get_json()


def test_a_request_curve_values_and_is_audited(client):
    body = post(client, {"basis": "standard-ultimate", "interest": SPOT, "items": [ITEM]})
    engine = annuity_values([models.susm()], [Item((Life(65.0),), Payments("advance", 12))],
                            Valuation(Curve.from_mapping(SPOT)))[0]
    assert body["results"][0]["value"] == pytest.approx(engine, rel=1e-14)
    interest = body["audit"]["interest"]
    assert interest == {"kind": "spot", "terms": [1.0, 5.0, 10.0, 30.0],
                        "rates": SPOT["rates"], "source": "request",
                        "digest": Curve.from_mapping(SPOT).digest()}
    assert "spot rate" in body["results"][0]["method"]["discounting"]


def test_a_one_band_structure_is_the_flat_rate(client):
    flat = post(client, {"basis": "standard-ultimate", "interest_rate": 0.04, "items": [ITEM]})
    for interest in ({"kind": "flat", "rate": 0.04},
                     {"kind": "segments", "edges": [], "rates": [0.04]},
                     {"kind": "forward", "edges": [], "rates": [0.04]},
                     {"kind": "spot", "terms": [12], "rates": [0.04]}):
        got = post(client, {"basis": "standard-ultimate", "interest": interest,
                            "items": [ITEM]})
        assert got["results"][0]["value"] == pytest.approx(flat["results"][0]["value"],
                                                           rel=1e-12)


@pytest.mark.parametrize("interest, path", [
    ({"kind": "spot", "terms": [5, 1], "rates": [0.03, 0.04]}, "interest.terms.1"),
    ({"kind": "segments", "edges": [5], "rates": [0.03]}, "interest.rates"),
    ({"kind": "forward", "edges": [10], "rates": [0.05, 2.0]}, "interest.rates.1"),
    ({"kind": "flat", "rate": -0.7}, "interest.rate"),
    ({"kind": "curve", "rate": 0.04}, "interest.kind"),
    ({"kind": "spot", "terms": [1], "rates": [0.03], "extra": 1}, "interest.extra"),
    ("0.04", "interest"),
])
def test_bad_structures_name_the_field(client, interest, path):
    response = client.post(URL, json={"basis": "standard-ultimate", "interest": interest,
                                      "items": [ITEM]})
    assert_problem(response, 422, path)


def test_interest_and_interest_rate_together_are_refused(client):
    response = client.post(URL, json={"basis": "standard-ultimate", "interest": SPOT,
                                      "interest_rate": 0.04, "items": [ITEM]})
    assert_problem(response, 422, "interest")


def test_measures_on_request(client):
    items = [ITEM | {"measures": ["duration", "convexity", "key_rate_durations"]}, ITEM]
    body = post(client, {"basis": "standard-ultimate", "interest": SPOT, "items": items})
    first, second = body["results"]
    assert "duration" not in second
    keys = first["key_rate_durations"]
    assert [k["term"] for k in keys] == SPOT["terms"]
    assert sum(k["duration"] for k in keys) == pytest.approx(first["duration"], rel=1e-12)
    assert first["convexity"] > first["duration"] ** 2  # a spread of payment times

    def shifted(y):
        curve = {**SPOT, "rates": [math.expm1(math.log1p(r) + y) for r in SPOT["rates"]]}
        return post(client, {"basis": "standard-ultimate", "interest": curve,
                             "items": [ITEM]})["results"][0]["value"]

    h = 2e-5
    # -(1/V) dV/dy by a central difference of the service's own values.
    fd = -(shifted(h) - shifted(-h)) / (2 * h) / first["value"]
    assert first["duration"] == pytest.approx(fd, rel=1e-6)


def test_band_key_rates_name_their_bands(client):
    interest = {"kind": "segments", "edges": [5, 20], "rates": [0.045, 0.052, 0.055]}
    body = post(client, {"basis": "standard-ultimate", "interest": interest, "items": [
        ITEM | {"measures": ["key_rate_durations"]}]})
    keys = body["results"][0]["key_rate_durations"]
    assert [(k["from"], k["to"]) for k in keys] == [(0.0, 5), (5.0, 20), (20.0, None)]


def test_unknown_measure_is_refused(client):
    response = client.post(URL, json={"basis": "standard-ultimate", "items": [
        ITEM | {"measures": ["modified_duration"]}]})
    assert_problem(response, 422, "items.0.measures.0")


def test_a_basis_on_a_curve(client):
    detail = client.get("/v1/bases/fernhollow-market").get_json()
    assert detail["defaults"]["interest"]["kind"] == "spot"
    body = post(client, {"basis": "fernhollow-market", "items": [
        {"lives": [{"age": 65, "sex": "female"}], "timing": "advance", "frequency": 12}]})
    assert body["audit"]["interest"]["source"] == "basis"
    assert body["audit"]["interest"]["digest"] == detail["defaults"]["interest"]["digest"]
    # Commutation columns need a flat rate: the basis' curve is refused, a given rate is not.
    lt = "/v1/bases/fernhollow-market/life-table"
    query = {"columns": "commutation", "sex": "female", "from_age": 60, "to_age": 60}
    assert_problem(client.get(lt, query_string=query), 422, "interest_rate")
    assert client.get(lt, query_string=query | {"interest_rate": 0.035}).status_code == 200


def test_schedules_discount_each_row_on_the_curve(client):
    interest = {"kind": "forward", "edges": [10], "rates": [0.05, 0.035]}
    body = {"basis": "standard-ultimate", "interest": interest,
            "item": {"lives": [{"age": 60}], "timing": "arrears", "frequency": 4, "term": 20}}
    got = client.post("/v1/cash-flow-schedules", json=body).get_json()
    t = np.array([r["time"] for r in got["rows"]])
    # The product over the bands of (1 + f)^-(years in the band): the definition.
    expected = 1.05 ** -np.minimum(t, 10) * 1.035 ** -np.maximum(t - 10, 0)
    np.testing.assert_allclose([r["discount"] for r in got["rows"]], expected, rtol=1e-13)
    factor = post(client, {"basis": "standard-ultimate", "interest": interest,
                           "items": [body["item"]]})["results"][0]["value"]
    assert got["totals"]["factor"] == pytest.approx(factor, rel=1e-10)
    response = client.post("/v1/cash-flow-schedules", json=body, headers={"Accept": "text/csv"})
    assert json.loads(response.headers["X-Interest-Structure"]) == {
        "kind": "forward", "edges": [10.0], "rates": [0.05, 0.035]}
    assert response.headers["X-Interest-Digest"] == got["audit"]["interest"]["digest"]
    assert "X-Interest-Rate" not in response.headers
    assert len(list(csv.DictReader(io.StringIO(response.get_data(as_text=True))))) == 80


def test_a_curve_rate_that_looks_like_a_percentage_warns(client):
    interest = {"kind": "spot", "terms": [1, 10], "rates": [0.03, 0.45]}
    body = post(client, {"basis": "standard-ultimate", "interest": interest, "items": [ITEM]})
    assert [w["path"] for w in body["warnings"]] == ["interest.rates.1"]


@pytest.mark.parametrize("timing", ("advance", "continuous"))
def test_values_with_measures_equal_values_without(client, timing):
    item = {"lives": [{"age": 61.3}], "timing": timing, "frequency": 1, "guarantee": 5}
    plain = post(client, {"basis": "standard-ultimate", "interest": SPOT,
                          "items": [item]})["results"][0]
    measured = post(client, {"basis": "standard-ultimate", "interest": SPOT, "items": [
        item | {"measures": ["duration"]}]})["results"][0]
    # One pass gives both: the same payments, summed (or integrated by a rule exact to
    # rounding) with their times.
    assert measured["value"] == pytest.approx(plain["value"], rel=1e-12)
    if timing == "continuous":
        assert "Gauss-Legendre" in measured["method"]["evaluation"]


def test_a_woolhouse_value_stays_woolhouse_with_measures(client):
    item = {"lives": [{"age": 65, "sex": "female"}], "timing": "advance", "frequency": 12}
    plain = post(client, {"basis": "fernhollow-annuitants@2025.1", "items": [item]})
    measured = post(client, {"basis": "fernhollow-annuitants@2025.1", "items": [
        item | {"measures": ["duration"]}]})
    assert measured["results"][0]["value"] == plain["results"][0]["value"]
    assert measured["results"][0]["method"]["approximation"] == "woolhouse-2"
