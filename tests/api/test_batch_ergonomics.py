"""Item ids echoed in results, and factors as CSV."""

import csv
import io

from tests.api.problem import assert_problem

URL = "/v1/annuity-factors"


def test_ids_are_echoed(client):
    body = client.post(URL, json={"basis": "standard-ultimate", "items": [
        {"id": "policy-1", "lives": [{"age": 65}], "timing": "advance"},
        {"lives": [{"age": 60}], "timing": "advance"}]}).get_json()
    assert body["results"][0]["id"] == "policy-1"
    assert "id" not in body["results"][1]
    insurance = client.post("/v1/insurance-factors", json={"basis": "standard-ultimate",
                                                           "items": [{"id": "x", "lives": [
                                                               {"age": 65}],
                                                               "cover": "whole-life"}]})
    assert insurance.get_json()["results"][0]["id"] == "x"


def test_an_id_longer_than_64_is_refused(client):
    assert_problem(client.post(URL, json={"basis": "standard-ultimate", "items": [
        {"id": "x" * 65, "lives": [{"age": 65}], "timing": "advance"}]}), 422, "items.0.id")


def test_factors_as_csv(client):
    body = {"basis": "standard-ultimate", "interest": {
        "kind": "segments", "edges": [5], "rates": [0.03, 0.04]}, "items": [
        {"id": "a", "lives": [{"age": 65}], "timing": "advance",
         "measures": ["duration", "key_rate_durations"], "spread": {"percentiles": [5, 95]}},
        {"id": "b", "lives": [{"age": 60}], "timing": "arrears", "frequency": 12}]}
    as_json = client.post(URL, json=body).get_json()["results"]
    response = client.post(URL, json=body, headers={"Accept": "text/csv"})
    assert response.status_code == 200 and response.mimetype == "text/csv"
    rows = list(csv.DictReader(io.StringIO(response.get_data(as_text=True))))
    assert [r["id"] for r in rows] == ["a", "b"]
    assert [float(r["value"]) for r in rows] == [r["value"] for r in as_json]
    assert float(rows[0]["duration"]) == as_json[0]["duration"]
    assert float(rows[0]["key_rate_0_5"]) == as_json[0]["key_rate_durations"][0]["duration"]
    assert float(rows[0]["percentile_95"]) == as_json[0]["percentiles"][1]["value"]
    assert rows[1]["duration"] == "" and rows[1]["approximation"] == "exact"
    assert response.headers["X-Basis-Id"] == "standard-ultimate"
    assert response.headers["X-Interest-Kind"] == "segments"


def test_an_accept_the_service_cannot_produce_is_406(client):
    response = client.post(URL, json={"basis": "standard-ultimate", "items": [
        {"lives": [{"age": 65}], "timing": "advance"}]}, headers={"Accept": "application/xml"})
    assert_problem(response, 406)
