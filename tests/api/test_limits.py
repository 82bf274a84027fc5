"""Hostile bodies and refs: each gets a 4xx problem, and refs never reach the file system."""

import json
import sys

import pytest

from service import create_app
from tests.api.problem import assert_problem

URL = "/v1/annuity-factors"
VALID = {"basis": "standard-ultimate", "items": [{"lives": [{"age": 65}], "timing": "advance"}]}

# File opens seen while ``_watching`` is set (an audit hook cannot be removed, so it is gated).
_opened: list[str] = []
_watching = [False]


def _audit(event, args):
    if _watching[0] and event == "open":
        _opened.append(str(args[0]))


sys.addaudithook(_audit)


def _post_text(client, text: str):
    return client.post(URL, data=text.encode(), content_type="application/json")


class TestHostileBodies:
    def test_deeply_nested_json_is_a_400(self, client):
        assert_problem(_post_text(client, "[" * 100_000 + "]" * 100_000), 400)

    def test_deeply_nested_value_inside_a_valid_body_is_refused(self, client):
        body = json.dumps(VALID).replace('"age": 65', '"age": ' + "[" * 50_000 + "]" * 50_000)
        assert_problem(_post_text(client, body), 400)

    def test_integer_with_thousands_of_digits_is_a_400(self, client):
        body = json.dumps(VALID).replace('"age": 65', '"age": ' + "9" * 5000)
        assert_problem(_post_text(client, body), 400)

    @pytest.mark.parametrize("number", ("1e308", "-1e308", "1.7976931348623157e308"))
    def test_huge_finite_numbers_are_out_of_range(self, client, number):
        body = json.dumps(VALID).replace('"age": 65', f'"age": {number}')
        assert_problem(_post_text(client, body), 422, "items.0.lives.0.age")

    def test_huge_interest_rate_is_out_of_range(self, client):
        assert_problem(client.post(URL, json=VALID | {"interest_rate": 1e308}), 422,
                       "interest_rate")

    def test_many_items_in_a_huge_body_are_413_before_parsing(self):
        app = create_app({"TESTING": True, "MAX_CONTENT_LENGTH": 10_000})
        body = json.dumps({"basis": "standard-ultimate", "items": [VALID["items"][0]] * 1000})
        response = app.test_client().post(URL, data=body, content_type="application/json")
        assert_problem(response, 413)

    def test_schedule_body_with_wrong_media_type_is_415(self, client):
        response = client.post("/v1/cash-flow-schedules", data="{}", content_type="text/csv")
        assert_problem(response, 415)


PATH_LIKE = ("..", "..%2F..%2Fetc%2Fpasswd", "%2e%2e%2f%2e%2e%2f", "%2Fetc%2Fpasswd",
             "standard-ultimate@..%2F..%2Fx", "..%5C..%5Cwindows", "tables%2Fstandard-ultimate",
             "%252e%252e%252f", "standard-ultimate-2026.1.toml")


class TestPathLikeRefs:
    @pytest.mark.parametrize("ref", PATH_LIKE)
    @pytest.mark.parametrize("suffix", ("", "/life-table"))
    def test_get_is_404_and_opens_no_file(self, client, ref, suffix):
        _opened.clear()
        _watching[0] = True
        try:
            response = client.get(f"/v1/bases/{ref}{suffix}")
        finally:
            _watching[0] = False
        assert_problem(response, 404)
        assert _opened == []

    @pytest.mark.parametrize("ref", ("../tables", "/etc/passwd", "..\\..\\x",
                                     "standard-ultimate@../../x", "%2e%2e%2f"))
    def test_post_is_404_and_opens_no_file(self, client, ref):
        _opened.clear()
        _watching[0] = True
        try:
            response = client.post(URL, json=VALID | {"basis": ref})
        finally:
            _watching[0] = False
        assert_problem(response, 404)
        assert _opened == []


class TestWorkLimit:
    def test_batch_needing_too_many_payment_dates_is_413_before_valuing(self):
        app = create_app({"TESTING": True, "MAX_EVALUATION_POINTS": 100_000})
        # 20 young couples paid daily to the last survivor: about 20 x 110 x 365 = 800,000
        # dates (a single life is valued on shared columns, about one unit an item).
        body = {"basis": "standard-ultimate", "items": [
            {"lives": [{"age": 20}, {"age": 20}], "survivorship": "last-survivor",
             "timing": "advance", "frequency": 365}] * 20}
        problem = assert_problem(app.test_client().post(URL, json=body), 413)
        assert "Split the batch" in problem["detail"]

    def test_guaranteed_payments_cost_a_unit_a_year(self):
        # The guaranteed part is valued in closed form, year by year: a long daily guarantee
        # costs a unit a year (its arrays), and equals the sum of its payments.
        app = create_app({"TESTING": True, "MAX_EVALUATION_POINTS": 50_000})
        item = {"lives": [{"age": 60}], "timing": "advance", "frequency": 365, "term": 100,
                "guarantee": 100}
        factor = app.test_client().post(URL, json={"basis": "standard-ultimate",
                                                   "items": [item]})
        assert factor.status_code == 200, factor.get_json()
        rows = app.test_client().post("/v1/cash-flow-schedules", json={
            "basis": "standard-ultimate", "item": item}).get_json()
        assert len(rows["rows"]) == 36_500
        value = factor.get_json()["results"][0]["value"]
        assert abs(rows["totals"]["present_value"] / value - 1) < 1e-12

    def test_work_is_priced_by_what_it_costs(self):
        # A continuous segment costs what integrating it costs: two lives under Balducci
        # split their pieces near both poles.
        from service.engine.annuity import Item, Life, Payments, Valuation
        from service.engine.batch import _prepare, _work
        from tests.reference import models

        two = Item((Life(30.0), Life(28.0)), Payments("continuous"), (1, 1, 1))
        one = Item((Life(30.0),), Payments("continuous"))
        costs = {}
        for assumption in ("udd", "balducci"):
            val = Valuation(0.04, assumption)
            for name, item in (("one", one), ("two", two)):
                batch = _prepare([models.susm()], [item], val)
                costs[assumption, name] = int(_work(batch, val.curve)[0])
        # The same segments, priced: one life 1 (UDD) or 3 (Balducci), two lives 2 or 10.
        assert costs["balducci", "one"] == 3 * costs["udd", "one"]
        assert costs["balducci", "two"] == 5 * costs["udd", "two"]

    def test_a_schedule_too_long_is_413(self):
        app = create_app({"TESTING": True, "MAX_SCHEDULE_ROWS": 1000})
        item = {"lives": [{"age": 60}], "timing": "advance", "frequency": 365}
        problem = assert_problem(app.test_client().post("/v1/cash-flow-schedules", json={
            "basis": "standard-ultimate", "item": item}), 413)
        assert "rows" in problem["detail"]
        short = item | {"frequency": 12, "term": 10}
        assert app.test_client().post("/v1/cash-flow-schedules", json={
            "basis": "standard-ultimate", "item": short}).status_code == 200

    @pytest.mark.parametrize("measures", ([], ["duration"]))
    def test_a_valuation_past_its_deadline_is_503_counted(self, measures):
        from service.api.metrics import DEADLINES

        app = create_app({"TESTING": True, "DEADLINE_SECONDS": -1.0})
        route = "/v1/annuity-factors"
        before = DEADLINES.labels(route)._value.get()
        body = {"basis": "standard-ultimate", "items": [
            {"lives": [{"age": 60}], "timing": "advance", "frequency": 12,
             "measures": measures}]}
        response = app.test_client().post(URL, json=body)
        problem = assert_problem(response, 503)
        assert response.headers["Retry-After"] == "5"
        assert "deadline" in problem["detail"]
        assert DEADLINES.labels(route)._value.get() == before + 1

    def test_charset_other_than_utf8_is_415(self, client):
        response = client.post(URL, data=json.dumps(VALID).encode("latin-1"),
                               content_type="application/json; charset=latin-1")
        assert_problem(response, 415)
