"""What a request means, said out loud: methods, warnings, required choices, months, status."""

import json
from pathlib import Path

import numpy as np
import pytest

from tests.api.problem import assert_problem

FACTORS = "/v1/annuity-factors"
SCHEDULES = "/v1/cash-flow-schedules"
LIFE_65 = {"lives": [{"age": 65}], "timing": "advance"}


def factors(client, body):
    response = client.post(FACTORS, json=body)
    assert response.status_code == 200, response.get_data(as_text=True)
    return response.get_json()


# ---- the method block ------------------------------------------------------------------------


def test_an_exactly_summed_item_is_not_called_woolhouse(client):
    # Aged 100 with 25 years guaranteed on a table that ends at 120: every year after the
    # guarantee is beyond the table, so the whole value is an exact sum.
    item = {"lives": [{"age": 100, "sex": "female"}], "timing": "advance", "frequency": 12,
            "guarantee": 25}
    body = factors(client, {"basis": "fernhollow-annuitants@2025.1", "items": [item]})
    result = body["results"][0]
    assert result["method"]["approximation"] == "exact"
    sched = client.post(SCHEDULES, json={"basis": "fernhollow-annuitants@2025.1",
                                         "item": item}).get_json()
    assert result["value"] == pytest.approx(sched["totals"]["factor"], rel=1e-12)


def test_a_woolhouse_item_says_so(client):
    item = {"lives": [{"age": 65, "sex": "female"}], "timing": "advance", "frequency": 12}
    body = factors(client, {"basis": "fernhollow-annuitants@2025.1", "items": [item]})
    assert body["results"][0]["method"]["approximation"] == "woolhouse-2"


# ---- no silent defaults ------------------------------------------------------------------------


def test_two_lives_need_survivorship(client):
    item = {"lives": [{"age": 65}, {"age": 62}], "timing": "advance"}
    body = assert_problem(client.post(FACTORS, json={"basis": "standard-ultimate",
                                                     "items": [item]}),
                          422, "items.0.survivorship")
    assert "joint-life" in body["errors"]["items.0.survivorship"][0]


def test_start_requires_reaches_the_engine(client):
    item = {"lives": [{"age": 55}, {"age": 52}], "timing": "advance", "frequency": 12,
            "deferral": 10, "survivorship": {"both": 1, "first_only": 1, "second_only": 0.5}}
    values = [factors(client, {"basis": "standard-ultimate",
                               "items": [item | {"start_requires": r}]})["results"][0]["value"]
              for r in ("any", "first", "both")]
    # The figures given when the rule was asked for (hand calculations): 8.55887, 8.41966.
    assert round(values[0], 5) == 8.55887 and round(values[1], 5) == 8.41966
    assert values[2] < values[1]
    assert_problem(client.post(FACTORS, json={"basis": "standard-ultimate", "items": [
        item | {"start_requires": "member"}]}), 422, "items.0.start_requires")


# ---- warnings -----------------------------------------------------------------------------------


def warnings_of(body) -> dict[str, str]:
    return {w["path"]: w["message"] for w in body["warnings"]}


def test_no_warnings_for_a_plain_request(client):
    assert factors(client, {"basis": "standard-ultimate", "items": [LIFE_65]})["warnings"] == []


@pytest.mark.parametrize("path, body", [
    ("items.0.lives.0.sex", {"basis": "standard-ultimate", "items": [
        {"lives": [{"age": 65, "sex": "male"}], "timing": "advance"}]}),
    ("items.0.lives.0.duration", {"basis": "standard-ultimate", "items": [
        {"lives": [{"age": 65, "duration": 0}], "timing": "advance"}]}),
    ("interest_rate", {"basis": "standard-ultimate", "interest_rate": 0.45,
                       "items": [LIFE_65]}),
    ("interest_rate", {"basis": "standard-ultimate", "interest_rate": -0.08,
                       "items": [LIFE_65]}),
    ("items.0.lives.0.mortality_multiplier", {"basis": "standard-ultimate", "items": [
        {"lives": [{"age": 65, "mortality_multiplier": 12}], "timing": "advance"}]}),
    ("basis", {"basis": "fernhollow-annuitants", "items": [
        {"lives": [{"age": 65, "sex": "male"}], "timing": "advance"}]}),
])
def test_warnings_name_the_input(client, path, body):
    got = warnings_of(factors(client, body))
    assert path in got and got[path]


def test_warnings_never_change_a_number(client):
    plain = factors(client, {"basis": "standard-ultimate", "items": [LIFE_65]})
    noisy = factors(client, {"basis": "standard-ultimate", "items": [
        {"lives": [{"age": 65, "sex": "female", "duration": 3}], "timing": "advance"}]})
    assert noisy["warnings"]
    assert noisy["results"][0]["value"] == plain["results"][0]["value"]


def test_warnings_are_capped(client):
    items = [{"lives": [{"age": 65, "sex": "male"}], "timing": "advance"}] * 150
    got = factors(client, {"basis": "standard-ultimate", "items": items})["warnings"]
    assert len(got) == 101
    assert got[-1]["message"].startswith("50 more")


def test_schedule_carries_warnings_and_status(client):
    body = {"basis": "fernhollow-annuitants", "item": {
        "lives": [{"age": 70, "sex": "female", "mortality_multiplier": 50}],
        "timing": "arrears", "frequency": 4, "term": 10}}
    json_body = client.post(SCHEDULES, json=body).get_json()
    assert json_body["audit"]["basis"]["status"] == "demo"
    assert "item.lives.0.mortality_multiplier" in warnings_of(json_body)
    csv = client.post(SCHEDULES, json=body, headers={"Accept": "text/csv"})
    assert csv.headers["X-Basis-Status"] == "demo"
    assert "item.lives.0.mortality_multiplier" in csv.headers["X-Warnings"]


# ---- durations in whole periods, or in months --------------------------------------------------


def test_a_duration_that_is_not_whole_months_names_the_nearest(client):
    body = assert_problem(client.post(FACTORS, json={"basis": "standard-ultimate", "items": [
        {"lives": [{"age": 65}], "timing": "advance", "frequency": 12, "term": 10.0833}]}),
        422, "items.0.term")
    assert body["errors"]["items.0.term"] == [
        "10.0833 is not a whole number of months; nearest: 10.083333333333334 (121 months)"]


@pytest.mark.parametrize("years, months", [("term", "term_months"),
                                           ("deferral", "deferral_months"),
                                           ("guarantee", "guarantee_months")])
def test_months_equal_years(client, years, months):
    base = {"lives": [{"age": 60}], "timing": "advance", "frequency": 12, "term": 25}
    in_years = factors(client, {"basis": "standard-ultimate",
                                "items": [base | {years: 121 / 12}]})
    item = {k: v for k, v in base.items() if k != years} | {months: 121}
    in_months = factors(client, {"basis": "standard-ultimate", "items": [item]})
    assert in_months["results"][0]["value"] == in_years["results"][0]["value"]
    both = base | {years: 121 / 12, months: 121}
    assert_problem(client.post(FACTORS, json={"basis": "standard-ultimate", "items": [both]}),
                   422, f"items.0.{months}")


def test_a_guarantee_in_months_longer_than_the_term_is_refused(client):
    item = {"lives": [{"age": 60}], "timing": "advance", "frequency": 12, "term_months": 60,
            "guarantee_months": 61}
    assert_problem(client.post(FACTORS, json={"basis": "standard-ultimate", "items": [item]}),
                   422, "items.0.guarantee")


# ---- the life table's errors carry their field --------------------------------------------------


@pytest.mark.parametrize("query, field", [
    ({"from_age": 10}, "from_age"), ({"from_age": 60, "to_age": 59}, "to_age"),
    ({"from_age": 20, "duration": 1}, "duration")])
def test_life_table_errors_name_their_field(client, query, field):
    response = client.get("/v1/bases/standard-select/life-table", query_string=query)
    assert_problem(response, 422, field)


# ---- the contract ------------------------------------------------------------------------------


def test_the_contract_passes_a_standard_validator():
    from openapi_spec_validator import validate

    validate(json.loads((Path(__file__).parents[2] / "openapi" / "openapi.json").read_text()))


def test_the_closing_year_stays_closed_under_a_zero_multiplier(client):
    # Stated convention: q at the table's last age stays 1 under any multiplier, so a
    # multiplier of 0 pays to the end of the table's last year: an annuity-certain-due
    # of 131 - 65 = 66 years at 5%.
    item = {"lives": [{"age": 65, "mortality_multiplier": 0}], "timing": "advance"}
    value = factors(client, {"basis": "standard-ultimate", "items": [item]})["results"][0]
    certain = (1 - 1.05 ** -66) / (0.05 / 1.05)
    assert np.isclose(value["value"], certain, rtol=1e-12)


def test_flat_extra_through_the_api(client):
    rated = factors(client, {"basis": "standard-ultimate", "items": [
        {"lives": [{"age": 65, "flat_extra": 0.005}], "timing": "advance"}]})
    plain = factors(client, {"basis": "standard-ultimate", "items": [LIFE_65]})
    assert rated["results"][0]["value"] < plain["results"][0]["value"]
    assert rated["warnings"] == []
    per_mille = factors(client, {"basis": "standard-ultimate", "items": [
        {"lives": [{"age": 65, "flat_extra": 0.5}], "timing": "advance"}]})
    assert [w["path"] for w in per_mille["warnings"]] == ["items.0.lives.0.flat_extra"]
    assert_problem(client.post(FACTORS, json={"basis": "standard-ultimate", "items": [
        {"lives": [{"age": 65, "flat_extra": 1.5}], "timing": "advance"}]}), 422,
        "items.0.lives.0.flat_extra")
