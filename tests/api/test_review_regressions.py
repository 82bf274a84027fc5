"""Regressions found by reviewing the interest, Woolhouse and pricing changes."""

import pytest

from service import create_app
from tests.api.problem import assert_problem

URL = "/v1/annuity-factors"


def value(client, body, index=0):
    response = client.post(URL, json=body)
    assert response.status_code == 200, response.get_data(as_text=True)
    return response.get_json()["results"][index]


def test_a_woolhouse_year_ending_with_the_life_dead_is_summed_exactly(client):
    # q(95) = 1 under a multiplier of 9: the life aged 95.5 is dead by t = 0.5. Exact:
    # sum over j = 1..5 of (1 - j/6) 1.045^(-j/12) / 12 (UDD within the year; by hand).
    item = {"lives": [{"age": 95.5, "sex": "male", "mortality_multiplier": 9}],
            "timing": "arrears", "frequency": 12}
    got = value(client, {"basis": "fernhollow-annuitants@2025.1", "items": [item]})
    expected = sum((1 - j / 6) * 1.045 ** (-j / 12) / 12 for j in range(1, 6))
    assert got["value"] == pytest.approx(expected, rel=1e-12)
    assert got["method"]["approximation"] == "exact"


@pytest.mark.parametrize("term", (5, None))
def test_woolhouse_under_segments_stays_as_close_as_at_a_flat_rate(client, term):
    segments = {"kind": "segments", "edges": [5, 20], "rates": [0.045, 0.052, 0.055]}
    item = {"lives": [{"age": 65, "sex": "male"}], "timing": "advance", "frequency": 12,
            "term": term}
    two = value(client, {"basis": "fernhollow-annuitants@2025.1", "interest": segments,
                         "items": [item]})["value"]
    # Schedules are summed exactly: the Woolhouse value stays within 0.05% of it, as at a
    # flat rate (an edge at a year's end was valued with the next band's rate: -0.24%).
    schedule = client.post("/v1/cash-flow-schedules", json={
        "basis": "fernhollow-annuitants@2025.1", "interest": segments, "item": item})
    assert abs(two / schedule.get_json()["totals"]["factor"] - 1) < 5e-4


def test_three_terms_at_a_forward_kink(client):
    # A forward rate of 0 for ten years, then 30%: the year ending at the kink uses the
    # force inside it.
    forward = {"kind": "forward", "edges": [10], "rates": [0.0, 0.3]}
    app = create_app({"TESTING": True})
    item = {"lives": [{"age": 45}], "timing": "advance", "frequency": 12}
    from service.engine.annuity import Item, Life, Payments, Valuation, annuity_values
    from service.engine.curves import Curve
    from tests.reference import models

    curve = Curve.from_mapping(forward)
    exact = annuity_values([models.susm()], [Item((Life(45.0),), Payments("advance", 12))],
                           Valuation(curve))[0]
    three = annuity_values([models.susm()], [Item((Life(45.0),), Payments("advance", 12))],
                           Valuation(curve, approximation="woolhouse-3"))[0]
    # Measured 1.7e-4 (1.6e-3 with the force after the kink at the year's end).
    assert abs(three - exact) < 3e-4
    assert app.test_client().post(URL, json={"basis": "standard-ultimate", "interest": forward,
                                             "items": [item]}).status_code == 200


def test_a_huge_integer_rate_is_refused_not_raised(client):
    body = ('{"basis": "standard-ultimate", "interest": {"kind": "spot", "terms": [1, '
            + "9" * 400 + '], "rates": [0.03, 0.04]}, "items": [{"lives": [{"age": 60}], '
            '"timing": "advance"}]}')
    response = client.post(URL, data=body, content_type="application/json")
    assert_problem(response, 422, "interest.terms.1")


def test_measures_are_priced_by_every_date_they_sum():
    app = create_app({"TESTING": True, "MAX_EVALUATION_POINTS": 200_000})
    item = {"lives": [{"age": 100}], "timing": "advance", "frequency": 365, "guarantee": 100}
    body = {"basis": "standard-ultimate", "items": [item] * 6}
    assert app.test_client().post(URL, json=body).status_code == 200  # closed form: cheap
    # Sensitivities sum every guaranteed date: 6 x 36,500 units.
    measured = {**body, "items": [item | {"measures": ["duration"]}] * 6}
    assert_problem(app.test_client().post(URL, json=measured), 413)


def test_key_rate_entries_are_capped():
    app = create_app({"TESTING": True, "MAX_KEY_RATE_ENTRIES": 100})
    spot = {"kind": "spot", "terms": list(range(1, 31)), "rates": [0.04] * 30}
    item = {"lives": [{"age": 60}], "timing": "advance", "term": 5,
            "measures": ["key_rate_durations"]}
    ok = app.test_client().post(URL, json={"basis": "standard-ultimate", "interest": spot,
                                           "items": [item] * 3})
    assert ok.status_code == 200
    assert_problem(app.test_client().post(URL, json={"basis": "standard-ultimate",
                                                     "interest": spot, "items": [item] * 4}),
                   413)


def test_csv_headers_stay_short(client):
    spot = {"kind": "spot", "terms": list(range(1, 201)), "rates": [0.301234567891] * 200}
    body = {"basis": "fernhollow-annuitants", "interest": spot, "item": {
        "lives": [{"age": 70, "sex": "female", "mortality_multiplier": 11}],
        "timing": "arrears", "frequency": 4, "term": 10}}
    response = client.post("/v1/cash-flow-schedules", json=body,
                           headers={"Accept": "text/csv"})
    assert response.status_code == 200
    assert "X-Interest-Structure" not in response.headers  # too long: the digest names it
    assert response.headers["X-Interest-Digest"].startswith("sha256:")
    assert "more (ask for JSON" in response.headers["X-Warnings"]
    assert sum(len(k) + len(v) for k, v in response.headers.items()) < 8192


@pytest.mark.parametrize("ref, query, first_age", [
    ("standard-select", {"duration": 2}, 22), ("standard-ultimate", {"duration": 5}, 20)])
def test_life_table_defaults_with_a_duration(client, ref, query, first_age):
    response = client.get(f"/v1/bases/{ref}/life-table", query_string=query)
    assert response.status_code == 200
    assert response.get_json()["rows"][0]["age"] == first_age


def test_a_months_field_is_named_in_its_error(client):
    item = {"lives": [{"age": 60}], "timing": "advance", "frequency": 365, "term_months": 1}
    problem = assert_problem(client.post(URL, json={"basis": "standard-ultimate",
                                                    "items": [item]}), 422,
                             "items.0.term_months")
    assert "items.0.term" not in problem["errors"]
