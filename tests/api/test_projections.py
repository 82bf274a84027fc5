"""POST /v1/cash-flow-projections: a portfolio's expected payments by period."""

import csv
import io

import pytest

from tests.api.problem import assert_problem

URL = "/v1/cash-flow-projections"
ITEMS = [
    {"id": "FM-1", "amount": 12000, "lives": [{"age": 65, "sex": "female"}],
     "timing": "advance", "frequency": 12, "guarantee": 5},
    {"id": "FM-2", "amount": 6000, "lives": [{"age": 70.4, "sex": "male"}],
     "timing": "continuous", "deferral": 1.5, "term": 20},
    {"id": "FM-3", "amount": 9000, "lives": [{"age": 66, "sex": "male"},
                                             {"age": 63, "sex": "female"}],
     "timing": "arrears", "frequency": 4, "survivorship": {"both": 1, "first_only": 1,
                                                           "second_only": 0.5}},
]


def factors(client, items):
    plain = [{k: v for k, v in item.items() if k not in ("amount", "id")} for item in items]
    body = client.post("/v1/annuity-factors", json={"basis": "fernhollow-annuitants",
                                                    "items": plain}).get_json()
    return [r["value"] for r in body["results"]]


@pytest.mark.parametrize("buckets", ("monthly", "annual"))
def test_total_is_the_sum_of_amount_times_factor(client, buckets):
    body = client.post(URL, json={"basis": "fernhollow-annuitants", "buckets": buckets,
                                  "items": ITEMS}).get_json()
    expected = sum(item["amount"] * f for item, f in zip(ITEMS, factors(client, ITEMS),
                                                         strict=True))
    assert body["totals"]["present_value"] == pytest.approx(expected, rel=1e-10)
    assert sum(r["present_value"] for r in body["rows"]) == pytest.approx(
        body["totals"]["present_value"], rel=1e-12)
    width = {"monthly": 1 / 12, "annual": 1.0}[buckets]
    assert all(r["end"] - r["start"] == pytest.approx(width) for r in body["rows"])
    # Common practice: the first year of a 5-year guarantee of 12,000 a year monthly in
    # advance pays 12,000 for certain, plus the other items' expected payments.
    first_year = sum(r["payment"] for r in body["rows"] if r["start"] < 1 - 1e-9)
    assert first_year > 12000


def test_exact_times_for_discrete_payments(client):
    discrete = [ITEMS[0], ITEMS[2]]
    body = client.post(URL, json={"basis": "fernhollow-annuitants", "buckets": "exact",
                                  "items": discrete}).get_json()
    assert all(r["start"] == r["end"] for r in body["rows"])
    assert body["rows"][0] == {"start": 0.0, "end": 0.0, "payment": 1000.0,
                               "present_value": 1000.0}
    problem = assert_problem(client.post(URL, json={"basis": "fernhollow-annuitants",
                                                    "buckets": "exact", "items": ITEMS}),
                             422, "items.1.timing")
    assert "monthly or annual" in problem["errors"]["items.1.timing"][0]


def test_per_item_refusals_and_csv(client):
    items = [*ITEMS, {"id": "bad", "amount": 1, "lives": [{"age": 65}], "timing": "advance"}]
    body = client.post(URL, json={"basis": "fernhollow-annuitants", "on_error": "per-item",
                                  "items": items}).get_json()
    assert (body["valued"], body["refused"]) == (3, 1)
    assert body["refused_items"][0]["item"] == 3 and body["refused_items"][0]["id"] == "bad"
    response = client.post(URL, json={"basis": "fernhollow-annuitants", "items": ITEMS},
                           headers={"Accept": "text/csv"})
    rows = list(csv.DictReader(io.StringIO(response.get_data(as_text=True))))
    assert list(rows[0]) == ["start", "end", "payment", "present_value"]
    assert float(response.headers["X-Total-Present-Value"]) == pytest.approx(
        sum(float(r["present_value"]) for r in rows), rel=1e-12)


def test_amount_is_required(client):
    item = {k: v for k, v in ITEMS[0].items() if k != "amount"}
    assert_problem(client.post(URL, json={"basis": "fernhollow-annuitants", "items": [item]}),
                   422, "items.0.amount")


def test_from_csv(client):
    text = "id,amount,age,sex,timing,frequency\nA,12000,65,female,advance,12\n"
    response = client.post(f"{URL}?basis=fernhollow-annuitants&buckets=annual",
                           data=text.encode(), content_type="text/csv")
    assert response.status_code == 200, response.get_data(as_text=True)
    assert response.get_json()["totals"]["present_value"] == pytest.approx(
        12000 * factors(client, [ITEMS[0] | {"guarantee": 0}])[0], rel=1e-10)
