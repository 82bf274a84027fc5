"""POST /v1/annuity-factors: values, batches, the audit block and every kind of refusal."""

import json
from datetime import UTC, datetime, timedelta

import numpy as np
import pytest

from service import create_app
from tests.api.problem import assert_problem

URL = "/v1/annuity-factors"
LIFE_65 = {"lives": [{"age": 65}], "timing": "advance"}


def post(client, body, **kwargs):
    return client.post(URL, json=body, **kwargs)


def values(response) -> list[float]:
    assert response.status_code == 200, response.get_data(as_text=True)
    return [r["value"] for r in response.get_json()["results"]]


def listed(client) -> dict[tuple[str, str], dict]:
    return {(b["id"], b["version"]): b for b in client.get("/v1/bases").get_json()["bases"]}


# ---- values ---------------------------------------------------------------------------------


def test_single_item_reproduces_the_published_whole_life_annuity_due(client):
    # Source: Dickson, Hardy and Waters, Actuarial Mathematics for Life Contingent Risks,
    # Standard Ultimate Survival Model tables (recalled from memory): a-due(65) = 13.5498 at 5%.
    response = post(client, {"basis": "standard-ultimate", "items": [LIFE_65]})
    (value,) = values(response)
    assert value == pytest.approx(13.5498, abs=5e-5)
    result = response.get_json()["results"][0]
    assert set(result["method"]) == {"evaluation", "fractional_age", "approximation",
                                     "discounting"}


def test_batch_reproduces_published_values_in_order(client):
    # Source: Dickson, Hardy and Waters, Actuarial Mathematics for Life Contingent Risks,
    # Standard Ultimate Survival Model tables (recalled from memory), 5% interest.
    published = {20: 19.9664, 40: 18.4578, 60: 14.9041, 65: 13.5498}
    items = [{"lives": [{"age": age}], "timing": "advance"} for age in published]
    got = values(post(client, {"basis": "standard-ultimate", "items": items}))
    np.testing.assert_allclose(got, list(published.values()), rtol=0, atol=5e-5)


def test_illustrative_basis_reproduces_its_published_value(client):
    # Source: Bowers, Gerber, Hickman, Jones and Nesbitt, Actuarial Mathematics (2nd ed.),
    # Illustrative Life Table (recalled from memory): a-due(65) = 9.8969 at 6%.
    (value,) = values(post(client, {"basis": "illustrative", "items": [LIFE_65]}))
    assert value == pytest.approx(9.8969, abs=5e-5)


MIXED_ITEMS = [
    {"lives": [{"age": 65, "sex": "female"}], "timing": "advance"},
    {"lives": [{"age": 72.5, "sex": "male"}], "timing": "arrears", "frequency": 12},
    {"lives": [{"age": 60.25, "sex": "female"}], "timing": "continuous", "deferral": 5,
     "term": 20},
    {"lives": [{"age": 55, "sex": "male", "duration": 0}], "timing": "advance",
     "frequency": 4, "deferral": 10, "guarantee": 5, "escalation": 0.02},
    {"lives": [{"age": 80, "sex": "female", "mortality_multiplier": 1.3}],
     "timing": "advance", "frequency": 2, "term": 10},
    {"lives": [{"age": 68, "sex": "male"}, {"age": 64.5, "sex": "female"}],
     "timing": "advance", "frequency": 12, "survivorship": "joint-life"},
    {"lives": [{"age": 68, "sex": "male"}, {"age": 64.5, "sex": "female"}],
     "timing": "advance", "frequency": 12,
     "survivorship": {"both": 1, "first_only": 1, "second_only": 0.6667}},
    {"lives": [{"age": 70, "sex": "male", "age_adjustment": -2}], "timing": "advance"},
]


def test_batch_results_answer_items_in_order(client):
    body = {"basis": "fernhollow-annuitants", "items": MIXED_ITEMS}
    batch = values(post(client, body))
    assert len(batch) == len(MIXED_ITEMS)
    single = [values(post(client, {"basis": "fernhollow-annuitants", "items": [item]}))[0]
              for item in MIXED_ITEMS]
    np.testing.assert_allclose(batch, single, rtol=1e-12, atol=0)
    # The items differ, so a shuffled answer could not pass.
    assert len(set(np.round(batch, 9))) == len(batch)
    reverse = values(post(client, {"basis": "fernhollow-annuitants",
                                   "items": MIXED_ITEMS[::-1]}))
    np.testing.assert_allclose(reverse, batch[::-1], rtol=1e-12, atol=0)


def test_sex_is_ignored_on_a_unisex_basis(client):
    items = [{"lives": [{"age": 65, "sex": sex}], "timing": "advance"}
             for sex in ("female", "male")] + [LIFE_65]
    got = values(post(client, {"basis": "standard-ultimate", "items": items}))
    np.testing.assert_allclose(got, [got[2]] * 3, rtol=0, atol=0)


def test_sex_matters_on_the_sex_distinct_demo_basis(client):
    items = [{"lives": [{"age": 65, "sex": sex}], "timing": "advance"}
             for sex in ("female", "male")]
    female, male = values(post(client, {"basis": "fernhollow-annuitants", "items": items}))
    # The invented male rates are heavier than the female ones at every age.
    assert female > male


# ---- the audit block ------------------------------------------------------------------------


@pytest.mark.parametrize("ref, key", [
    ("standard-ultimate", ("standard-ultimate", "2026.1")),
    ("fernhollow-annuitants", ("fernhollow-annuitants", "2026.1")),
    ("fernhollow-annuitants@2025.1", ("fernhollow-annuitants", "2025.1")),
])
def test_audit_names_the_basis_used(client, ref, key):
    item = {"lives": [{"age": 65, "sex": "female"}], "timing": "advance"}
    response = post(client, {"basis": ref, "items": [item]})
    assert response.status_code == 200
    audit = response.get_json()["audit"]
    entry = listed(client)[key]
    assert audit["basis"] == {"id": entry["id"], "version": entry["version"],
                              "digest": entry["digest"], "status": entry["status"]}
    assert set(audit["service"]) == {"name", "version"}


def test_interest_from_the_basis_unless_the_request_gives_one(client, registry):
    own = post(client, {"basis": "standard-ultimate", "items": [LIFE_65]})
    digest = own.get_json()["audit"]["interest"].pop("digest")
    assert own.get_json()["audit"]["interest"] == {"kind": "flat", "rate": 0.05,
                                                   "source": "basis", "digest": digest}
    same = post(client, {"basis": "standard-ultimate", "interest_rate": 0.05,
                         "items": [LIFE_65]})
    assert same.get_json()["audit"]["interest"] == {"kind": "flat", "rate": 0.05,
                                                    "source": "request", "digest": digest}
    np.testing.assert_allclose(values(same), values(own), rtol=1e-15, atol=0)
    lower = post(client, {"basis": "standard-ultimate", "interest_rate": 0.03,
                          "items": [LIFE_65]})
    assert lower.get_json()["audit"]["interest"]["rate"] == pytest.approx(0.03, abs=0)
    assert lower.get_json()["audit"]["interest"]["source"] == "request"
    # Lower interest, higher present value (common practice).
    assert values(lower)[0] > values(own)[0] + 1.0
    assert registry.resolve("standard-ultimate").interest_rate == pytest.approx(0.05, abs=0)


def test_request_id_and_computed_at_are_present(client):
    before = datetime.now(UTC)
    response = post(client, {"basis": "standard-ultimate", "items": [LIFE_65]})
    audit = response.get_json()["audit"]
    assert audit["request_id"] and audit["request_id"] == response.headers["X-Request-ID"]
    assert audit["computed_at"].endswith("Z")
    stamp = datetime.fromisoformat(audit["computed_at"])
    assert stamp.utcoffset() == timedelta(0)
    assert before - timedelta(seconds=5) <= stamp <= datetime.now(UTC) + timedelta(seconds=5)
    other = post(client, {"basis": "standard-ultimate", "items": [LIFE_65]})
    assert other.get_json()["audit"]["request_id"] != audit["request_id"]


def test_incoming_request_id_is_echoed(client):
    rid = "fernhollow-quote-0042"
    response = post(client, {"basis": "standard-ultimate", "items": [LIFE_65]},
                    headers={"X-Request-ID": rid})
    assert response.headers["X-Request-ID"] == rid
    assert response.get_json()["audit"]["request_id"] == rid
    failed = post(client, {"basis": "no-such-basis", "items": [LIFE_65]},
                  headers={"X-Request-ID": rid})
    body = assert_problem(failed, 404)
    assert body["request_id"] == rid


def test_malformed_request_id_is_replaced(client):
    response = post(client, {"basis": "standard-ultimate", "items": [LIFE_65]},
                    headers={"X-Request-ID": "not an id; with spaces"})
    assert response.status_code == 200
    rid = response.headers["X-Request-ID"]
    assert rid and " " not in rid
    assert response.get_json()["audit"]["request_id"] == rid


# ---- the sex of a life on a sex-distinct basis ----------------------------------------------


def test_demo_basis_needs_sex(client):
    body = assert_problem(post(client, {"basis": "fernhollow-annuitants",
                                        "items": [LIFE_65]}), 422, "items.0.lives.0.sex")
    assert body["audit"]["basis"]["id"] == "fernhollow-annuitants"


def test_missing_sex_is_located_in_a_batch(client):
    items = [{"lives": [{"age": 65, "sex": "male"}], "timing": "advance"},
             {"lives": [{"age": 65, "sex": "male"}, {"age": 61}], "timing": "advance",
              "survivorship": "joint-life"}]
    body = assert_problem(post(client, {"basis": "fernhollow-annuitants", "items": items}),
                          422, "items.1.lives.1.sex")
    assert list(body["errors"]) == ["items.1.lives.1.sex"]


# ---- errors ---------------------------------------------------------------------------------

VALID = json.dumps({"basis": "standard-ultimate", "items": [LIFE_65]})


def raw(text: str | bytes, content_type: str | None = "application/json") -> dict:
    data = text.encode("utf-8") if isinstance(text, str) else text
    kwargs = {"data": data}
    if content_type is not None:
        kwargs["content_type"] = content_type
    return kwargs


def item(**changes) -> dict:
    return {"basis": "standard-ultimate", "items": [LIFE_65 | changes]}


def life(**changes) -> dict:
    return item(lives=[{"age": 65} | changes])


def two_lives(**changes) -> dict:
    return item(lives=[{"age": 65}, {"age": 62}], **changes)


BAD_BODIES = {
    "malformed JSON": (raw('{"basis": "standard-ultimate", "items": ['), 400, None),
    "trailing garbage": (raw(VALID + " }"), 400, None),
    "not UTF-8": (raw('{"basis": "standard-ultimaté", "items": []}'.encode("latin-1")), 400,
                  None),
    "NaN literal": (raw(VALID.replace('"age": 65', '"age": NaN')), 400, None),
    "Infinity literal": (raw(VALID.replace('"age": 65', '"age": Infinity')), 400, None),
    "number too large": (raw(VALID.replace('"age": 65', '"age": 1e999')), 400, None),
    "duplicate keys": (raw('{"basis": "standard-ultimate", "basis": "illustrative", '
                           '"items": [{"lives": [{"age": 65}], "timing": "advance"}]}'), 400,
                       None),
    "duplicate keys deep": (raw(VALID.replace('"age": 65', '"age": 65, "age": 66')), 400, None),
    "text/plain": (raw(VALID, "text/plain"), 415, None),
    "form encoded": (raw(VALID, "application/x-www-form-urlencoded"), 415, None),
    "no content type": (raw(VALID, None), 415, None),
}

BAD_REQUESTS = {
    "unknown basis": ({"basis": "no-such-basis", "items": [LIFE_65]}, 404, None),
    "unknown version": ({"basis": "standard-ultimate@1999.1", "items": [LIFE_65]}, 404, None),
    "parent folder": ({"basis": "../tables", "items": [LIFE_65]}, 404, None),
    "encoded parent folder": ({"basis": "%2e%2e%2f", "items": [LIFE_65]}, 404, None),
    "absolute path": ({"basis": "/etc/passwd", "items": [LIFE_65]}, 404, None),
    "path in version": ({"basis": "standard-ultimate@../../x", "items": [LIFE_65]}, 404,
                        None),
    "file name": ({"basis": "standard-ultimate-2026.1.toml", "items": [LIFE_65]}, 404, None),
    "age past table end": (life(age=131), 422, "items.0.lives.0.age"),
    "age before table start": (life(age=19.5), 422, "items.0.lives.0.age"),
    "adjusted age past end": (life(age=125, age_adjustment=10), 422, "items.0.lives.0.age"),
    "guarantee longer than term": (item(term=5, guarantee=10), 422, "items.0.guarantee"),
    "term not whole months": (item(frequency=12, term=10.05), 422, "items.0.term"),
    "deferral not whole years": (item(deferral=0.5), 422, "items.0.deferral"),
    "guarantee not whole quarters": (item(frequency=4, guarantee=1.1), 422,
                                     "items.0.guarantee"),
    "string age": (life(age="65"), 422, "items.0.lives.0.age"),
    "string frequency": (item(frequency="12"), 422, "items.0.frequency"),
    "string interest": ({"basis": "standard-ultimate", "interest_rate": "0.05",
                         "items": [LIFE_65]}, 422, "interest_rate"),
    "boolean age": (life(age=True), 422, "items.0.lives.0.age"),
    "boolean frequency": (item(frequency=True), 422, "items.0.frequency"),
    "boolean term": (item(term=True), 422, "items.0.term"),
    "boolean interest": ({"basis": "standard-ultimate", "interest_rate": False,
                          "items": [LIFE_65]}, 422, "interest_rate"),
    "fractional frequency": (item(frequency=12.5), 422, "items.0.frequency"),
    "unknown top-level field": ({"basis": "standard-ultimate", "currency": "GBP",
                                 "items": [LIFE_65]}, 422, "currency"),
    "unknown item field": (item(colour="blue"), 422, "items.0.colour"),
    "unknown life field": (life(height=1.8), 422, "items.0.lives.0.height"),
    "unknown timing": (item(timing="whenever"), 422, "items.0.timing"),
    "three lives": (item(lives=[{"age": 65}, {"age": 62}, {"age": 60}]), 422,
                    "items.0.lives"),
    "no lives": (item(lives=[]), 422, "items.0.lives"),
    "survivorship above one": (two_lives(survivorship={"both": 1, "first_only": 1.5,
                                                        "second_only": 0}), 422,
                               "items.0.survivorship.first_only"),
    "survivorship below zero": (two_lives(survivorship={"both": -0.1, "first_only": 1,
                                                         "second_only": 1}), 422,
                                "items.0.survivorship.both"),
    "survivorship with one life": (item(survivorship="joint-life"), 422,
                                   "items.0.survivorship"),
    "unknown survivorship shortcut": (two_lives(survivorship="half-and-half"), 422,
                                      "items.0.survivorship"),
    "no items": ({"basis": "standard-ultimate", "items": []}, 422, "items"),
    "no basis": ({"items": [LIFE_65]}, 422, "basis"),
    "body not an object": ([LIFE_65], 422, None),
}


@pytest.mark.parametrize("kwargs, status, path", BAD_BODIES.values(), ids=list(BAD_BODIES))
def test_unreadable_bodies_are_refused(client, kwargs, status, path):
    assert_problem(client.post(URL, **kwargs), status, path)


@pytest.mark.parametrize("body, status, path", BAD_REQUESTS.values(), ids=list(BAD_REQUESTS))
def test_invalid_requests_are_refused(client, body, status, path):
    assert_problem(post(client, body), status, path)


def test_impossible_item_is_located_in_a_batch(client):
    items = [LIFE_65, LIFE_65, {"lives": [{"age": 65}, {"age": 140}], "timing": "advance",
                                "survivorship": "last-survivor"}]
    body = assert_problem(post(client, {"basis": "standard-ultimate", "items": items}), 422,
                          "items.2.lives.1.age")
    assert list(body["errors"]) == ["items.2.lives.1.age"]


def test_error_for_unknown_basis_has_no_basis_in_audit(client):
    body = assert_problem(post(client, {"basis": "no-such-basis", "items": [LIFE_65]}), 404)
    assert body["audit"]["basis"] is None


@pytest.fixture(scope="module")
def small_app():
    return create_app({"TESTING": True, "MAX_ITEMS": 3, "MAX_CONTENT_LENGTH": 4096})


def test_batch_at_the_limit_is_served(small_app):
    response = post(small_app.test_client(), {"basis": "standard-ultimate",
                                               "items": [LIFE_65] * 3})
    assert len(values(response)) == 3


def test_batch_over_the_limit_is_refused(small_app):
    response = post(small_app.test_client(), {"basis": "standard-ultimate",
                                               "items": [LIFE_65] * 4})
    body = assert_problem(response, 413)
    assert "3" in body["detail"]


def test_body_over_the_size_limit_is_refused(small_app):
    padded = {"basis": "standard-ultimate", "items": [LIFE_65], "note": "x" * 5000}
    assert_problem(post(small_app.test_client(), padded), 413)


def test_unknown_route_is_a_problem(client):
    assert_problem(client.get("/v1/no-such-thing"), 404)


def test_wrong_method_is_a_problem(client):
    response = client.get(URL)
    assert_problem(response, 405)
    assert "POST" in response.headers["Allow"]
    assert_problem(client.delete("/v1/bases"), 405)


def test_unexpected_failure_is_a_problem_without_a_trace(caplog):
    app = create_app({"TESTING": True})

    @app.get("/fails-on-purpose")
    def _fails():
        raise RuntimeError("internal detail that must not leave the service")

    with caplog.at_level("ERROR"):
        response = app.test_client().get("/fails-on-purpose")
    body = assert_problem(response, 500)
    assert "internal detail" not in response.get_data(as_text=True)
    # The trace goes to the log instead, under the request id.
    assert any(body["request_id"] in r.getMessage() and r.exc_info for r in caplog.records)
