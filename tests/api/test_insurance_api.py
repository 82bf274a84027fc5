"""POST /v1/insurance-factors: values, second moments, refusals, interest structures."""

import math

import pytest

from tests.api.problem import assert_problem

URL = "/v1/insurance-factors"


def post(client, body):
    response = client.post(URL, json=body)
    assert response.status_code == 200, response.get_data(as_text=True)
    return response.get_json()


def test_the_published_whole_life_insurance(client):
    body = post(client, {"basis": "standard-ultimate", "items": [
        {"lives": [{"age": 65}], "cover": "whole-life"}]})
    (result,) = body["results"]
    # Dickson, Hardy and Waters, AMLCR, Standard Ultimate Survival Model at 5%: A_65 =
    # 0.35477 (recalled from memory).
    assert result["value"] == pytest.approx(0.35477, abs=0.5e-5)
    assert result["second_moment"] < result["value"]
    assert "double the force" in result["method"]["second_moment"]
    assert body["audit"]["basis"]["id"] == "standard-ultimate"


def test_insurance_and_annuity_agree(client):
    item = {"lives": [{"age": 60, "sex": "female"}, {"age": 58, "sex": "male"}],
            "benefit_timing": "moment-of-death", "cover": "endowment", "term": 15,
            "on": "second-death"}
    insurance = post(client, {"basis": "fernhollow-annuitants", "interest_rate": 0.03,
                              "items": [item]})["results"][0]["value"]
    annuity = client.post("/v1/annuity-factors", json={
        "basis": "fernhollow-annuitants", "interest_rate": 0.03, "items": [
            {"lives": item["lives"], "timing": "continuous", "term": 15,
             "survivorship": "last-survivor"}]}).get_json()["results"][0]["value"]
    # A-bar = 1 - delta a-bar for the endowment on the last-survivor status (common practice).
    assert insurance == pytest.approx(1 - math.log(1.03) * annuity, rel=1e-12)


@pytest.mark.parametrize("item, path", [
    ({"lives": [{"age": 60}], "cover": "term"}, "items.0.term"),
    ({"lives": [{"age": 60}, {"age": 58}], "cover": "whole-life"}, "items.0.on"),
    ({"lives": [{"age": 60}], "cover": "whole-life", "on": "first-death"}, "items.0.on"),
    ({"lives": [{"age": 60}], "cover": "annuity"}, "items.0.cover"),
    ({"lives": [{"age": 60}], "cover": "term", "term": 10, "term_months": 120},
     "items.0.term_months"),
    ({"lives": [{"age": 60}], "cover": "term", "term": 10.5}, "items.0.term"),
    ({"lives": [{"age": 140}], "cover": "whole-life"}, "items.0.lives.0.age"),
])
def test_refusals_name_the_field(client, item, path):
    response = client.post(URL, json={"basis": "standard-ultimate", "items": [item]})
    assert_problem(response, 422, path)


def test_months_and_curves(client):
    curve = {"kind": "forward", "edges": [10], "rates": [0.05, 0.035]}
    body = post(client, {"basis": "standard-ultimate", "interest": curve, "items": [
        {"lives": [{"age": 50}], "cover": "term", "term_months": 120},
        {"lives": [{"age": 50}], "cover": "term", "term": 10}]})
    first, second = body["results"]
    assert first["value"] == second["value"]
    assert body["audit"]["interest"]["kind"] == "forward"
