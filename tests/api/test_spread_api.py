"""The spread of the present value through HTTP."""

import math

import pytest

from tests.api.problem import assert_problem

URL = "/v1/annuity-factors"


def test_spread_beside_the_value(client):
    body = client.post(URL, json={"basis": "standard-ultimate", "items": [
        {"lives": [{"age": 65}], "timing": "advance", "spread": {"percentiles": [95, 5, 50]}},
        {"lives": [{"age": 65}], "timing": "advance"}]}).get_json()
    first, second = body["results"]
    assert first["value"] == second["value"]
    assert "standard_deviation" not in second
    assert [p["percentile"] for p in first["percentiles"]] == [95, 5, 50]
    values = {p["percentile"]: p["value"] for p in first["percentiles"]}
    assert values[5] < values[50] < values[95]
    # Var = (2A - A^2)/d^2 with A_65 = 0.35477 and 2A_65 from the service's insurance route.
    insurance = client.post("/v1/insurance-factors", json={"basis": "standard-ultimate",
                                                           "items": [{"lives": [{"age": 65}],
                                                                      "cover": "whole-life"}]})
    a = insurance.get_json()["results"][0]
    d = 0.05 / 1.05
    assert first["standard_deviation"] == pytest.approx(
        math.sqrt(a["second_moment"] - a["value"] ** 2) / d, rel=1e-11)


@pytest.mark.parametrize("item, path", [
    ({"lives": [{"age": 65}], "timing": "advance", "spread": {"percentiles": [0]}},
     "items.0.spread.percentiles.0"),
    ({"lives": [{"age": 65}], "timing": "advance", "spread": {"percentiles": []}},
     "items.0.spread.percentiles"),
])
def test_refusals(client, item, path):
    assert_problem(client.post(URL, json={"basis": "standard-ultimate", "items": [item]}), 422,
                   path)


def test_two_lives_spread_costs_work(client):
    from service import create_app

    app = create_app({"TESTING": True, "MAX_EVALUATION_POINTS": 100_000})
    item = {"lives": [{"age": 30}, {"age": 28}], "timing": "advance", "frequency": 12,
            "survivorship": "last-survivor", "spread": {"percentiles": [50]}}
    # About (12 x 103)^2 outcomes to enumerate: more than the limit.
    response = app.test_client().post(URL, json={"basis": "standard-ultimate", "items": [item]})
    assert_problem(response, 413)
