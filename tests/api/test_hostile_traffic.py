"""Hostile and heavy traffic: capped error lists, bounded metric labels, bodies over the limit.

The reference for every capped error list is marshmallow's own full validation of the same
body with the same schema (a general-purpose library): the paths listed must be its first
ones, with its messages.
"""

import json
import math
import random
import string

import pytest
from flask import Response
from hypothesis import given, settings
from hypothesis import strategies as st
from marshmallow import ValidationError
from werkzeug.test import EnvironBuilder

from service import create_app
from service.api.body import MAX_OBJECT_MEMBERS, flatten_errors, validate_capped
from service.api.metrics import METHODS
from service.api.problems import MAX_ERROR_PATHS
from service.api.schemas import FactorRequestSchema, ItemSchema, ScheduleRequestSchema
from tests.api.problem import assert_problem

URL = "/v1/annuity-factors"
GOOD_ITEM = {"lives": [{"age": 65}], "timing": "advance"}

#: An item with 16 bad fields: six in its life (five wrong values and one unknown field),
#: seven wrong values in the item and three unknown item fields.
BAD_ITEM = {"lives": [{"age": "x", "sex": "X", "duration": "x", "age_adjustment": "x",
                       "mortality_multiplier": "x", "zz": 1}],
            "timing": "x", "frequency": "x", "term": "x", "deferral": "x", "guarantee": "x",
            "escalation": "x", "survivorship": 5, "u1": 1, "u2": 2, "u3": 3}
BAD_PATHS_PER_ITEM = 16


def full_paths(schema, body) -> dict[str, list[str]]:
    """Every error path of a full marshmallow validation, in its order."""
    with pytest.raises(ValidationError) as caught:
        schema.load(body)
    return flatten_errors(caught.value.messages)


class TestErrorCap:
    def test_ten_thousand_bad_items_list_the_first_hundred_paths(self, client):
        body = {"interest_rate": "x", "items": [BAD_ITEM] * 10_000}
        # marshmallow validates the items in order, so the first 100 paths of its full
        # validation are those of the first 1,000 items (which takes it a tenth as long).
        full = full_paths(FactorRequestSchema(), body | {"items": body["items"][:1000]})
        assert len(full) == 2 + BAD_PATHS_PER_ITEM * 1000
        problem = assert_problem(client.post(URL, json=body), 422)
        assert len(problem["errors"]) == MAX_ERROR_PATHS
        # The same paths and messages, in the same order, as the full validation's first 100.
        assert list(problem["errors"].items()) == list(full.items())[:MAX_ERROR_PATHS]
        # Checking stops after the item that reaches 100 paths: ceil(100 / 16) = 7 items,
        # whose 7 x 16 paths plus 'basis' and 'interest_rate' were all found.
        checked = math.ceil(MAX_ERROR_PATHS / BAD_PATHS_PER_ITEM)
        assert problem["errors_omitted"] == 2 + checked * BAD_PATHS_PER_ITEM - MAX_ERROR_PATHS
        assert f"{10_000 - checked} further list elements were not checked" in problem["detail"]

    def test_checking_stops_taking_items_once_the_cap_is_reached(self, monkeypatch):
        # Cheap, not just short: count the items that are validated at all.
        loads = []
        real = ItemSchema._do_load

        def counting(self, data, **kwargs):
            loads.append(1)
            return real(self, data, **kwargs)

        monkeypatch.setattr(ItemSchema, "_do_load", counting)
        validate_capped(FactorRequestSchema(), {"basis": "b", "items": [BAD_ITEM] * 10_000})
        assert len(loads) == math.ceil(MAX_ERROR_PATHS / BAD_PATHS_PER_ITEM)

    def test_long_list_of_bad_lives_in_one_item_stops_early(self, client):
        def body_with(lives):
            return {"basis": "standard-ultimate",
                    "items": [{"lives": [{"age": "x"}] * lives, "timing": "advance"}]}

        body = body_with(50_000)
        full = full_paths(FactorRequestSchema(), body_with(1000))  # the same first paths
        problem = assert_problem(client.post(URL, json=body), 422)
        assert list(problem["errors"].items()) == list(full.items())[:MAX_ERROR_PATHS]
        assert f"{50_000 - MAX_ERROR_PATHS} further list elements" in problem["detail"]

    def test_schedule_item_with_a_long_list_of_bad_lives(self, client):
        body = {"basis": "standard-ultimate",
                "item": {"lives": [{"age": -1, "sex": "x"}] * 1000, "timing": "advance"}}
        full = full_paths(ScheduleRequestSchema(), body)
        problem = assert_problem(client.post("/v1/cash-flow-schedules", json=body), 422)
        assert list(problem["errors"].items()) == list(full.items())[:MAX_ERROR_PATHS]

    def test_unknown_top_level_fields_are_counted_not_all_listed(self, client):
        extra = {f"field{n}": n for n in range(5000)}
        body = {"basis": "standard-ultimate", "items": [GOOD_ITEM]} | extra
        full = full_paths(FactorRequestSchema(), body)
        problem = assert_problem(client.post(URL, json=body), 422)
        # Listed in body order; marshmallow lists unknown fields in set order, so compare
        # the messages path by path.
        assert list(problem["errors"]) == list(extra)[:MAX_ERROR_PATHS]
        for path, messages in problem["errors"].items():
            assert messages == full[path]
        assert problem["errors_omitted"] == 5000 - MAX_ERROR_PATHS

    def test_unknown_top_level_fields_follow_the_other_errors(self, client):
        body = {"items": [BAD_ITEM], "zz-extra": 1}
        full = full_paths(FactorRequestSchema(), body)
        problem = assert_problem(client.post(URL, json=body), 422)
        assert list(problem["errors"].items()) == list(full.items())
        assert list(problem["errors"])[-1] == "zz-extra"
        assert "errors_omitted" not in problem

    def test_an_inner_object_with_too_many_members_is_413(self, client):
        life = {"age": 65} | {f"k{n}": 0 for n in range(MAX_OBJECT_MEMBERS)}
        body = {"basis": "standard-ultimate", "items": [{"lives": [life],
                                                         "timing": "advance"}]}
        problem = assert_problem(client.post(URL, json=body), 413)
        assert str(MAX_OBJECT_MEMBERS) in problem["detail"]

    def test_an_inner_object_at_the_member_limit_is_validated(self, client):
        life = {"age": 65} | {f"k{n}": 0 for n in range(MAX_OBJECT_MEMBERS - 1)}
        body = {"basis": "standard-ultimate", "items": [{"lives": [life],
                                                         "timing": "advance"}]}
        problem = assert_problem(client.post(URL, json=body), 422)
        assert problem["errors_omitted"] == MAX_OBJECT_MEMBERS - 1 - MAX_ERROR_PATHS

    def test_other_long_error_lists_are_capped_too(self, client):
        # The demo basis is sex-distinct: every one of these lives lacks a sex.
        body = {"basis": "fernhollow-annuitants", "items": [GOOD_ITEM] * 1000}
        problem = assert_problem(client.post(URL, json=body), 422)
        assert list(problem["errors"]) == [f"items.{n}.lives.0.sex"
                                           for n in range(MAX_ERROR_PATHS)]
        assert problem["errors_omitted"] == 1000 - MAX_ERROR_PATHS

    def test_a_few_errors_are_all_listed(self, client):
        body = {"basis": "standard-ultimate", "items": [GOOD_ITEM, BAD_ITEM, GOOD_ITEM]}
        full = full_paths(FactorRequestSchema(), body)
        problem = assert_problem(client.post(URL, json=body), 422)
        assert problem["errors"] == full
        assert "errors_omitted" not in problem


# ---- the capped validation against marshmallow's, on generated bodies -----------------------

_anything = st.one_of(st.none(), st.booleans(), st.integers(-5, 500), st.text(max_size=3),
                      st.floats(-1e3, 1e3, allow_nan=False), st.just([]), st.just({}))
_life = st.fixed_dictionaries({}, optional={
    "age": st.one_of(st.floats(0, 120), _anything), "sex": st.sampled_from(["female", "x"]),
    "duration": st.one_of(st.integers(0, 3), _anything), "zz": _anything})
_item = st.fixed_dictionaries({}, optional={
    "lives": st.one_of(st.lists(st.one_of(_life, _anything), max_size=4), _anything),
    "timing": st.sampled_from(["advance", "arrears", "continuous", "daily"]),
    "frequency": st.one_of(st.integers(0, 13), _anything),
    "term": st.one_of(st.floats(0, 30), _anything),
    "guarantee": st.one_of(st.floats(0, 30), _anything),
    "survivorship": st.sampled_from(["joint-life", "both", 3]), "u": _anything})
_bodies = st.fixed_dictionaries({}, optional={
    "basis": st.one_of(st.just("standard-ultimate"), _anything),
    "interest_rate": st.one_of(st.floats(-0.1, 0.1), _anything),
    "items": st.one_of(st.lists(st.one_of(_item, _anything), max_size=12), _anything)})


class TestAgainstFullValidation:
    @settings(max_examples=150, deadline=None)
    @given(body=_bodies, cap=st.integers(1, 12))
    def test_first_paths_and_result_match_marshmallow(self, body, cap):
        schema = FactorRequestSchema()
        try:
            expected = schema.load(body)
        except ValidationError as exc:
            full = flatten_errors(exc.messages)
        else:
            assert validate_capped(schema, body, cap=cap) == (expected, {}, 0, 0)
            return
        result, errors, omitted, unchecked = validate_capped(schema, body, cap=cap)
        assert result is None
        assert list(errors.items()) == list(full.items())[:cap]
        if unchecked == 0:
            assert len(errors) + omitted == len(full)
        else:
            assert len(errors) == cap and len(errors) + omitted <= len(full)

    def test_valid_batch_loads_exactly_as_marshmallow_does(self):
        items = [GOOD_ITEM, {"lives": [{"age": 61.5, "sex": "male"}, {"age": 58}],
                             "timing": "continuous", "term": 10, "survivorship": "joint-life"}]
        body = {"basis": "standard-ultimate", "interest_rate": 0.03, "items": items * 50}
        assert validate_capped(FactorRequestSchema(), body) == \
            (FactorRequestSchema().load(body), {}, 0, 0)


# ---- metrics: a fixed set of label values ---------------------------------------------------


def _series(client, metric: str) -> set[str]:
    text = client.get("/metrics").get_data(as_text=True)
    return {line.rsplit(" ", 1)[0] for line in text.splitlines()
            if line.startswith(metric + "{")}


def _labels(series: str) -> dict[str, str]:
    inside = series[series.index("{") + 1:series.rindex("}")]
    return dict(part.split("=", 1) for part in inside.split(","))


class TestBoundedMetrics:
    def test_random_methods_and_paths_add_a_bounded_number_of_series(self, client):
        rng = random.Random(20260801)
        before = _series(client, "annuity_http_requests_total")
        for _ in range(400):
            method = "".join(rng.choices(string.ascii_uppercase, k=20))
            path = "/" + "".join(rng.choices(string.ascii_lowercase + "/", k=24))
            client.open(path, method=method)
            client.open("/v1/bases", method=method)
            client.get(path)
        after = _series(client, "annuity_http_requests_total")
        # Three kinds of request, each with at most two statuses (404/405): the label
        # values come from a fixed set, not from what the caller sent.
        assert len(after - before) <= 6, sorted(after - before)
        routes = {rule.rule for rule in client.application.url_map.iter_rules()}
        # (The process-wide registry also holds series from other tests' apps.)
        for series in after - before:
            labels = _labels(series)
            assert labels["method"].strip('"') in METHODS | {"other"}
            assert labels["route"].strip('"') in routes | {"unmatched"}
        histogram = _series(client, "annuity_http_request_duration_seconds_count")
        assert {h.replace("_duration_seconds_count", "s_total") for h in histogram} == after

    def test_known_methods_keep_their_label(self, client):
        client.open("/v1/bases", method="PATCH")
        assert ('annuity_http_requests_total{method="PATCH",route="unmatched",status="405"}'
                in _series(client, "annuity_http_requests_total"))


# ---- bodies over the limit, however they are framed ------------------------------------------


def _post_chunked(app, data: bytes) -> Response:
    """POST ``data`` as a server passes a chunked body: no Content-Length, input terminated."""
    environ = EnvironBuilder(path=URL, method="POST", data=data,
                             content_type="application/json").get_environ()
    del environ["CONTENT_LENGTH"]
    environ["HTTP_TRANSFER_ENCODING"] = "chunked"
    environ["wsgi.input_terminated"] = True
    return app.response_class.from_app(app, environ)


VALID_BODY = json.dumps({"basis": "standard-ultimate", "items": [GOOD_ITEM]}).encode()


@pytest.fixture(scope="module")
def small():
    return create_app({"TESTING": True, "MAX_CONTENT_LENGTH": 4096})


class TestChunkedBodies:
    def test_valid_json_padded_past_the_limit_is_413(self, small):
        response = _post_chunked(small, VALID_BODY + b" " * (4096 - len(VALID_BODY) + 1))
        assert_problem(response, 413)

    def test_far_past_the_limit_is_413(self, small):
        assert_problem(_post_chunked(small, VALID_BODY + b" " * 100_000), 413)

    def test_exactly_at_the_limit_is_served(self, small):
        response = _post_chunked(small, VALID_BODY + b" " * (4096 - len(VALID_BODY)))
        assert response.status_code == 200, response.get_data(as_text=True)

    def test_a_small_chunked_body_is_served(self, small):
        assert _post_chunked(small, VALID_BODY).status_code == 200

    def test_default_limit_of_four_mebibytes(self):
        app = create_app({"TESTING": True})
        limit = app.config["MAX_CONTENT_LENGTH"]
        assert limit == 4 * 1024 * 1024
        assert_problem(_post_chunked(app, VALID_BODY + b" " * limit), 413)
        at_limit = _post_chunked(app, VALID_BODY + b" " * (limit - len(VALID_BODY)))
        assert at_limit.status_code == 200

    def test_with_content_length_over_the_limit_is_413_as_before(self, small):
        response = small.test_client().post(URL, data=VALID_BODY + b" " * 5000,
                                          content_type="application/json")
        assert_problem(response, 413)

    def test_with_content_length_at_the_limit_is_served_as_a_server_passes_it(self, small):
        # As gunicorn passes a body with a Content-Length: the input terminated too.
        body = VALID_BODY + b" " * (4096 - len(VALID_BODY))
        environ = EnvironBuilder(path=URL, method="POST", data=body,
                                 content_type="application/json").get_environ()
        environ["wsgi.input_terminated"] = True
        response = small.response_class.from_app(small, environ)
        assert response.status_code == 200, response.get_data(as_text=True)

    def test_a_body_shorter_than_its_content_length_is_400(self, small):
        # The client went away before sending what it announced.
        environ = EnvironBuilder(path=URL, method="POST", data=VALID_BODY,
                                 content_type="application/json").get_environ()
        environ["CONTENT_LENGTH"] = str(len(VALID_BODY) + 10)
        assert_problem(small.response_class.from_app(small, environ), 400)
