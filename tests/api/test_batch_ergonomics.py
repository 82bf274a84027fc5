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


class TestPerItemErrors:
    GOOD = {"id": "ok", "lives": [{"age": 65}], "timing": "advance"}

    def post(self, client, items, url=URL, **extra):
        response = client.post(url, json={"basis": "fernhollow-annuitants",
                                          "on_error": "per-item", "items": items} | extra)
        assert response.status_code == 200, response.get_data(as_text=True)
        return response.get_json()

    def test_valid_items_are_valued_and_invalid_ones_refused_in_place(self, client):
        items = [
            self.GOOD | {"lives": [{"age": 65, "sex": "female"}]},
            {"id": "bad-schema", "lives": [{"age": -3, "sex": "female"}], "timing": "daily",
             "frequency": 0},
            {"id": "no-sex", "lives": [{"age": 70}], "timing": "advance"},
            {"id": "too-old", "lives": [{"age": 125, "sex": "male"}], "timing": "advance"},
            self.GOOD | {"id": "ok-2", "lives": [{"age": 60, "sex": "male"}]},
        ]
        body = self.post(client, items)
        results = body["results"]
        assert (body["valued"], body["refused"]) == (2, 3)
        assert [r["id"] for r in results] == ["ok", "bad-schema", "no-sex", "too-old", "ok-2"]
        assert "value" in results[0] and "value" in results[4]
        # Every problem of a refused item at once: schema checks together.
        assert set(results[1]["problem"]["errors"]) == {"lives.0.age", "timing", "frequency"}
        assert set(results[2]["problem"]["errors"]) == {"lives.0.sex"}
        assert set(results[3]["problem"]["errors"]) == {"lives.0.age"}
        # The valued items are worth what they are worth alone.
        alone = client.post(URL, json={"basis": "fernhollow-annuitants",
                                       "items": [items[4]]}).get_json()
        assert results[4]["value"] == alone["results"][0]["value"]

    def test_reject_is_the_default(self, client):
        response = client.post(URL, json={"basis": "fernhollow-annuitants", "items": [
            self.GOOD | {"lives": [{"age": 65, "sex": "female"}]},
            {"lives": [{"age": 125, "sex": "male"}], "timing": "advance"}]})
        assert_problem(response, 422, "items.1.lives.0.age")

    def test_every_item_refused(self, client):
        body = self.post(client, [{"id": "x", "lives": [{"age": 65}], "timing": "advance"}])
        assert (body["valued"], body["refused"]) == (0, 1)
        assert body["results"][0]["id"] == "x" and "problem" in body["results"][0]

    def test_csv_names_the_problem(self, client):
        response = client.post(URL, headers={"Accept": "text/csv"}, json={
            "basis": "fernhollow-annuitants", "on_error": "per-item", "items": [
                self.GOOD | {"lives": [{"age": 65, "sex": "female"}]},
                {"id": "no-sex", "lives": [{"age": 70}], "timing": "advance"}]})
        rows = list(csv.DictReader(io.StringIO(response.get_data(as_text=True))))
        assert rows[0]["problem"] == "" and rows[0]["value"]
        assert rows[1]["value"] == "" and rows[1]["problem"].startswith("lives.0.sex:")

    def test_insurance_too(self, client):
        body = self.post(client, [
            {"lives": [{"age": 65, "sex": "male"}], "cover": "whole-life"},
            {"id": "no-term", "lives": [{"age": 65, "sex": "male"}], "cover": "term"}],
            url="/v1/insurance-factors")
        assert (body["valued"], body["refused"]) == (1, 1)
        assert "term" in body["results"][1]["problem"]["errors"]


def test_per_item_problems_are_capped(client):
    bad = {"lives": [{"age": -1, "sex": "x", "duration": -2}], "timing": "daily",
           "frequency": 0, "term": -1, "deferral": -1, "guarantee": -1, "escalation": 9}
    body = client.post(URL, json={"basis": "standard-ultimate", "on_error": "per-item",
                                  "items": [bad] * 50}).get_json()
    assert body["refused"] == 50
    listed = sum(len(r["problem"]["errors"]) for r in body["results"]
                 if "Not listed" not in str(r["problem"]["errors"]))
    assert listed <= 100
    assert "Not listed" in str(body["results"][-1]["problem"]["errors"])


class TestEveryProblemAtOnce:
    """In reject mode one answer lists the schema's problems and the basis' together, item by
    item (a bad term no longer hides an age past the table's end)."""

    def test_schema_and_basis_problems_come_together(self, client):
        response = client.post(URL, json={"basis": "fernhollow-annuitants", "items": [
            {"lives": [{"age": 65, "sex": "female"}], "timing": "advance", "term": -1},
            {"lives": [{"age": 130, "sex": "male"}], "timing": "advance"},
            {"lives": [{"age": 60}], "timing": "advance"},
            {"lives": [{"age": 60, "sex": "male"}], "timing": "advance"}]})
        errors = assert_problem(response, 422, "items.0.term")["errors"]
        assert list(errors) == ["items.0.term", "items.1.lives.0.age", "items.2.lives.0.sex"]
        assert errors["items.1.lives.0.age"] == ["age 130 is outside the table's ages 40 to 120"]

    def test_a_bad_request_field_keeps_the_schema_answer(self, client):
        response = client.post(URL, json={"basis": "fernhollow-annuitants", "interest_rate": "x",
                                          "items": [{"lives": [{"age": 130, "sex": "male"}],
                                                     "timing": "advance"}]})
        assert list(assert_problem(response, 422, "interest_rate")["errors"]) == [
            "interest_rate"]

    def test_the_cap_holds_over_both_kinds(self, client):
        items = [{"lives": [{"age": 65, "sex": "female"}], "timing": "advance", "term": -1},
                 *[{"lives": [{"age": 130, "sex": "male"}], "timing": "advance"}] * 300]
        body = assert_problem(client.post(URL, json={"basis": "fernhollow-annuitants",
                                                     "items": items}), 422, "items.0.term")
        assert len(body["errors"]) == 100 and body["errors_omitted"] == 201
