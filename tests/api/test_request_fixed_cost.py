"""The work a request does once per basis, per rate or per schema, made once and reused.

Each cache is checked against the computation written out here from its definition: the
audit block names the basis by id, version, digest and status (and its improvement scale),
and the interest by its canonical form and ``sha256:`` over that form's JSON with sorted
keys and no spaces (the digest's definition in the README's audit section); the request's
own fields load as marshmallow's ``schema.load`` loads them; an answer is encoded as
``jsonify`` encodes it. Request ids and times of computation are the only parts of an
answer that may differ between two requests.
"""

import copy
import datetime
import hashlib
import io
import json
import logging
import math
import re

import pytest

from service.api import audit, fastload, views
from service.api.body import load
from service.api.dump import json_response
from service.api.problems import ProblemError
from service.api.schemas import (
    FactorRequestSchema,
    InsuranceRequestSchema,
    ProjectionRequestSchema,
)
from service.api.state import current
from service.engine.curves import Curve


def _digest(form: dict) -> str:
    text = json.dumps(form, sort_keys=True, separators=(",", ":"))
    return "sha256:" + hashlib.sha256(text.encode("ascii")).hexdigest()


def _interest_form(curve: Curve) -> dict:
    if curve.kind == "flat":
        return {"kind": "flat", "rate": curve.rates[0]}
    name = "terms" if curve.kind == "spot" else "edges"
    return {"kind": curve.kind, name: list(curve.knots), "rates": list(curve.rates)}


def _basis_block(basis) -> dict:
    block = {"id": basis.id, "version": basis.version, "digest": basis.digest,
             "status": basis.status}
    if basis.improvement is not None:
        block["improvement"] = audit.improvement_block(basis.improvement)
    return block


def _without_ids(body: dict) -> dict:
    body = copy.deepcopy(body)
    body["audit"].pop("request_id")
    body["audit"].pop("computed_at")
    return body


# ---- the audit blocks of a basis ------------------------------------------------------------


def test_every_basis_gets_its_own_blocks_equal_to_the_definition(app, registry):
    bases = registry.listing()
    assert len({(b.id, b.version) for b in bases}) == len(bases) >= 2
    made = {}
    for basis in bases:
        for _ in range(2):  # made, then reused
            with app.test_request_context():
                audit.use_basis(basis)
                state = current()
                assert state.basis == _basis_block(basis)
                form = _interest_form(basis.interest)
                assert state.interest == form | {"digest": _digest(form), "source": "basis"}
                made.setdefault(basis, []).append((state.basis, state.interest))
    # Two versions of one id (fernhollow-annuitants 2025.1 and 2026.1) never share a block.
    assert {b.version for b in bases if b.id == "fernhollow-annuitants"} == \
        {"2025.1", "2026.1"}
    blocks = [(basis, block, interest) for basis, pairs in made.items()
              for block, interest in pairs]
    # Requests under one basis share its blocks (made once; a request that adds to its block
    # takes a copy, below); no two bases share one.
    for pairs in made.values():
        assert len({id(block) for block, _ in pairs}) == len({id(i) for _, i in pairs}) == 1
    assert len({id(block) for _, block, _ in blocks}) == len(made)
    assert len({id(interest) for _, _, interest in blocks}) == len(made)
    for basis, block, _ in blocks:
        for other, other_block, _ in blocks:
            if other is not basis:
                assert (block["id"], block["version"]) != \
                    (other_block["id"], other_block["version"])


def test_a_request_adding_to_its_block_leaves_the_next_requests_alone(app, registry):
    basis = registry.resolve("fernhollow-annuitants@2026.1")
    with app.test_request_context():
        audit.use_basis(basis)
        audit.use_age_definition(basis)
        assert current().basis["age_definition"] == basis.age_definition
        with pytest.raises(TypeError):  # the shared blocks are read-only
            current().interest["source"] = "changed by this request"
    with app.test_request_context():
        audit.use_basis(basis)
        assert current().basis == _basis_block(basis)
        assert "age_definition" not in current().basis
        assert current().interest["source"] == "basis"


@pytest.mark.parametrize("curve", [
    Curve.flat(0.0), Curve.flat(-0.0), Curve.flat(0.05), Curve.flat(0.05000000000000001),
    Curve.from_mapping({"kind": "spot", "terms": [1, 5], "rates": [0.03, 0.04]}),
    Curve.from_mapping({"kind": "spot", "terms": [1, 5], "rates": [0.03, -0.0]}),
    Curve.from_mapping({"kind": "segments", "edges": [1, 5], "rates": [0.03, 0.04, 0.05]}),
    Curve.from_mapping({"kind": "forward", "edges": [1, 5], "rates": [0.03, 0.04, 0.05]}),
])
def test_request_structures_get_the_block_of_their_own_form(app, registry, curve):
    basis = registry.resolve("standard-ultimate")
    for _ in range(2):
        with app.test_request_context():
            audit.use_basis(basis, curve)
            form = _interest_form(curve)
            # (0.0 and -0.0 are equal numbers with different forms, hence digests)
            assert current().interest == form | {"digest": _digest(form), "source": "request"}


def test_flat_request_rates_reuse_one_structure_per_rate():
    for rate in (0.0, -0.0, 0.05, 0.05000000000000001, -0.5, 1.0):
        curve = views._flat_curve(rate)
        assert views._flat_curve(rate) is curve
        assert curve == Curve.flat(rate) and repr(curve.rates[0]) == repr(rate)
    assert repr(views._flat_curve(-0.0).rates[0]) == "-0.0"
    assert repr(views._flat_curve(0.0).rates[0]) == "0.0"


def test_a_zero_rate_and_a_negative_zero_rate_answer_with_their_own_digests(client):
    body = {"basis": "standard-ultimate", "items": [{"lives": [{"age": 65}],
                                                     "timing": "advance"}]}
    seen = {}
    for text in ("0.0", "-0.0", "0.0"):
        raw = json.dumps(body)[:-1] + f', "interest_rate": {text}}}'
        answer = client.post("/v1/annuity-factors", data=raw,
                             content_type="application/json").get_json()
        interest = answer["audit"]["interest"]
        form = {"kind": "flat", "rate": float(text)}
        assert interest == form | {"digest": _digest(form), "source": "request"}
        seen.setdefault(text, interest["digest"])
        assert seen[text] == interest["digest"]
    assert seen["0.0"] != seen["-0.0"]


# ---- the request's own fields through the fast loader ---------------------------------------

TOP_BODIES = [
    {"basis": "standard-ultimate", "items": [{}]},
    {"basis": "standard-ultimate", "items": [1, "x", None]},
    {"basis": "standard-ultimate", "items": [{}], "interest_rate": 0.03,
     "valuation_date": "2026-12-31", "on_error": "per-item"},
    {"basis": "standard-ultimate", "items": [{}], "interest_rate": 3},
    {"basis": "standard-ultimate", "items": [{}], "interest_rate": None},
    {"basis": "standard-ultimate", "items": [{}], "interest_rate": 2.0},
    {"basis": "standard-ultimate", "items": [{}], "interest_rate": True},
    {"basis": "standard-ultimate", "items": [{}], "interest_rate": "0.03"},
    {"basis": "standard-ultimate", "items": [{}],
     "interest": {"kind": "spot", "terms": [1, 5], "rates": [0.03, 0.04]}},
    {"basis": "standard-ultimate", "items": [{}], "interest": {"kind": "flat", "rate": 2}},
    {"basis": "standard-ultimate", "items": [{}], "interest": {"kind": "curly"}},
    {"basis": "standard-ultimate", "items": [{}], "valuation_date": "2026-02-30"},
    {"basis": "standard-ultimate", "items": [{}], "valuation_date": "1899-12-31"},
    {"basis": "standard-ultimate", "items": [{}], "valuation_date": None},
    {"basis": "standard-ultimate", "items": [{}], "on_error": "ignore"},
    {"basis": "", "items": [{}]},
    {"basis": "x" * 201, "items": [{}]},
    {"basis": 7, "items": [{}]},
    {"basis": "standard-ultimate", "items": []},
    {"basis": "standard-ultimate", "items": {"0": {}}},
    {"basis": "standard-ultimate"},
    {"items": [{}]},
    {"basis": "standard-ultimate", "items": [{}], "colour": "blue"},
    {"basis": "standard-ultimate", "items": [{}], "buckets": "annual"},
    {},
]


@pytest.mark.parametrize("schema_class", [FactorRequestSchema, InsuranceRequestSchema,
                                          ProjectionRequestSchema])
@pytest.mark.parametrize("body", TOP_BODIES)
def test_the_requests_own_fields_load_as_marshmallow_loads_them(schema_class, body):
    schema = views._top_schema(schema_class())
    try:
        expected, refused = schema.load(copy.deepcopy(body)), None
    except Exception as exc:  # marshmallow's ValidationError
        expected, refused = None, exc
    quick = views._fast_top(schema_class(), copy.deepcopy(body))
    assert quick is None or (refused is None and quick == expected
                             and list(quick) == list(expected))
    # Through the view's helper: the same answer, or the same problem as before.
    try:
        got = views._load_top(schema_class(), copy.deepcopy(body))
    except ProblemError as exc:
        with pytest.raises(ProblemError) as before:
            load(schema, copy.deepcopy(body))
        assert (exc.status, exc.detail, exc.errors) == \
            (before.value.status, before.value.detail, before.value.errors)
    else:
        assert refused is None and got == expected and list(got) == list(expected)


def test_plain_request_fields_are_loaded_fast():
    body = {"basis": "standard-ultimate", "items": [{}], "interest_rate": 0.03,
            "valuation_date": "2026-12-31"}
    assert views._fast_top(FactorRequestSchema(), body) is not None


# ---- single-factor answers, byte for byte ---------------------------------------------------

SINGLES = [
    {"basis": "standard-ultimate",
     "items": [{"lives": [{"age": 65.5}], "timing": "advance", "frequency": 12}]},
    {"basis": "fernhollow-annuitants@2025.1", "interest_rate": 0.031,
     "items": [{"id": "p-1", "lives": [{"age": 70, "sex": "female"}], "timing": "arrears"}]},
    {"basis": "fernhollow-annuitants", "valuation_date": "2026-12-31",
     "items": [{"lives": [{"date_of_birth": "1958-03-14", "sex": "male"}],
                "timing": "advance", "measures": ["duration"]}]},
    {"basis": "fernhollow-pensioners", "valuation_date": "2026-12-31",
     "items": [{"lives": [{"age": 66, "sex": "female"}], "timing": "advance"}]},
    {"basis": "standard-ultimate", "interest": {"kind": "spot", "terms": [1, 10],
                                                "rates": [0.03, 0.04]},
     "items": [{"lives": [{"age": 65}], "timing": "continuous", "term": 10}]},
]


def _fresh_caches(monkeypatch):
    monkeypatch.setattr(audit, "_BASIS_BLOCKS", type(audit._BASIS_BLOCKS)())
    monkeypatch.setattr(audit, "_CURVE_BLOCKS", {})
    monkeypatch.setattr(views, "_FLAT_CURVES", {})


@pytest.mark.parametrize("body", SINGLES)
def test_a_single_factor_answers_alike_with_caches_cold_warm_and_without_fast_loading(
        client, monkeypatch, body):
    _fresh_caches(monkeypatch)
    cold = client.post("/v1/annuity-factors", json=body)
    warm = client.post("/v1/annuity-factors", json=body)
    with monkeypatch.context() as m:
        m.setattr(fastload, "fast_loader", lambda schema: None)
        _fresh_caches(m)
        slow = client.post("/v1/annuity-factors", json=body)
    assert cold.status_code == warm.status_code == slow.status_code == 200
    for other in (warm, slow):
        assert _without_ids(other.get_json()) == _without_ids(cold.get_json())
        # Byte for byte: the same text once the id and time are put back.
        answer = cold.get_json()["audit"]
        text = other.get_data(as_text=True)
        mine = other.get_json()["audit"]
        text = text.replace(mine["request_id"], answer["request_id"]).replace(
            mine["computed_at"], answer["computed_at"])
        assert text == cold.get_data(as_text=True)
        assert dict(other.headers).keys() == dict(cold.headers).keys()


# ---- the answer's encoding ------------------------------------------------------------------


def test_many_results_with_shared_method_blocks_still_encode_as_jsonify_does(app, monkeypatch):
    exact = {"evaluation": "sum \u00e9 \"quoted\"", "fractional_age": "udd",
             "approximation": "exact", "discounting": "v^t"}
    other = exact | {"approximation": "woolhouse-3"}
    base = [{"id": "a", "value": 1.5, "method": exact},
            {"value": 2.0, "rounded": 2.0, "ages": [None, 61.5], "method": other},
            None,
            {"id": "b", "problem": {"title": "t", "errors": {"x": ["y"]}}},
            {"id": "c", "value": -0.0, "method": dict(exact)}]
    for results in (base, base * 10):
        for shared_from in (0, views._SHARED_BLOCKS_FROM):
            monkeypatch.setattr(views, "_SHARED_BLOCKS_FROM", shared_from)
            body = {"results": results, "valued": 3, "refused": 1, "warnings": [],
                    "audit": {"request_id": "r"}}
            with app.test_request_context():
                assert views._results_json(body).get_data() == \
                    views.jsonify(body).get_data()
    assert len(base * 10) >= views._SHARED_BLOCKS_FROM


def test_a_json_answer_is_jsonify_s_byte_for_byte_whatever_the_provider_s_options(app):
    # dump.json_response (every JSON answer, problems too) keeps a compact encoder on the
    # app's JSON provider for its options; it must give what flask.jsonify gives (text,
    # mimetype), also after an option changes and in debug mode (indented, by jsonify).
    body = {"b": datetime.date(2026, 12, 31), "a": "\u00e9 \"q\"", "n": [1.5, -0.0, None]}
    provider = app.json
    try:
        for sort_keys, debug in ((False, False), (True, False), (False, True)):
            provider.sort_keys = sort_keys
            app.debug = debug
            with app.test_request_context():
                mine, theirs = json_response(body), views.jsonify(body)
                assert mine.get_data() == theirs.get_data()
                assert mine.mimetype == theirs.mimetype
    finally:
        provider.sort_keys, app.debug = False, False


# ---- the access log -------------------------------------------------------------------------


def test_without_info_logging_no_line_is_composed_and_metrics_still_count(client, caplog,
                                                                          monkeypatch):
    from service.api import metrics, observe

    counted = []
    monkeypatch.setattr(metrics, "observe", lambda *args: counted.append(args))
    composed = []
    line = observe._LINE
    monkeypatch.setattr(observe, "_LINE", lambda obj: composed.append(obj) or line(obj))
    with caplog.at_level(logging.WARNING, logger="service.access"):
        assert client.get("/livez").status_code == 200
    assert len(counted) == 1 and composed == []
    with caplog.at_level(logging.INFO, logger="service.access"):
        assert client.get("/livez").status_code == 200
    assert len(counted) == 2 and len(composed) == 1
    (record,) = [r for r in caplog.records if r.name == "service.access"]
    assert json.loads(record.getMessage()) == composed[0]
    assert record.getMessage() == json.dumps(composed[0], separators=(",", ":"))


def test_the_access_line_is_written_as_logging_writes_it(monkeypatch, caplog):
    # Under the service's own logging set-up (basicConfig: one stream handler on the root
    # writing the message alone) observe._write_line writes to that handler's stream itself;
    # the bytes are the ones logging writes for the same line. Any other set-up (here:
    # pytest's capture, a filter, another format) gets a record through logging.
    from service.api import observe

    line = json.dumps({"event": "request", "status": 200}, separators=(",", ":"))

    def written(handler, *, through_logging: bool) -> str:
        stream = io.StringIO()
        handler.setStream(stream)
        if through_logging:
            observe.access_log.handle(observe._record(line))
        else:
            observe._write_line(line)
        return stream.getvalue()

    plain = logging.StreamHandler()
    plain.setFormatter(logging.Formatter("%(message)s"))
    monkeypatch.setattr(logging.root, "handlers", [plain])
    assert observe._plain_handler() is plain
    assert written(plain, through_logging=False) == written(plain, through_logging=True) \
        == line + "\n"
    # Not plain: a filter on the way, another format, a second handler.
    plain.addFilter(lambda record: True)
    assert observe._plain_handler() is None
    plain.filters.clear()
    plain.setFormatter(logging.Formatter("%(levelname)s %(message)s"))
    assert observe._plain_handler() is None
    assert written(plain, through_logging=False) == "INFO " + line + "\n"
    plain.setFormatter(logging.Formatter("%(message)s"))
    with caplog.at_level(logging.INFO, logger="service.access"):
        monkeypatch.setattr(logging.root, "handlers", [plain, caplog.handler])
        assert observe._plain_handler() is None
        observe._write_line(line)
    assert [r.getMessage() for r in caplog.records if r.name == "service.access"] == [line]


# ---- the body's parse -----------------------------------------------------------------------


def _reference_parse(text: str):
    """json.loads with hooks written from the definition (every key checked one by one, every
    float checked finite, an object below the top with more than MAX_OBJECT_MEMBERS members
    refused with a 413)."""
    from service.api.body import MAX_OBJECT_MEMBERS, _BodyError

    inner = []

    def pairs(items):
        seen = {}
        for key, value in items:
            if key in seen:
                raise _BodyError(f"duplicate key '{key}'")
            seen[key] = value
        if len(seen) > MAX_OBJECT_MEMBERS:
            inner.append(seen)
        return seen

    def number(literal):
        value = float(literal)
        if value in (float("inf"), float("-inf")):
            raise _BodyError(f"number {literal} is out of range")
        return value

    def constant(name):
        raise _BodyError(f"'{name}' is not a JSON number")

    value = json.loads(text, object_pairs_hook=pairs, parse_constant=constant,
                       parse_float=number)
    big = [obj for obj in inner if obj is not value]
    if big:
        raise ProblemError(413, f"An object in the body has {len(big[0])} members; an object "
                                f"below the top level may have at most {MAX_OBJECT_MEMBERS}.")
    return value


def _parsed(parse, text):
    from service.api.body import _BodyError

    try:
        return "ok", repr(parse(text))
    except (_BodyError, ValueError) as exc:
        return "error", type(exc).__name__, str(exc)
    except ProblemError as exc:
        return "problem", exc.status, exc.detail


def _members(n: int, start: int = 0) -> str:
    return "{" + ", ".join(f'"k{k}": {k}' for k in range(start, start + n)) + "}"


PARSE_TEXTS = [
    '\ufeff{"a": 1}',                                   # a byte order mark
    '{"a": 1}\ufeff',
    _members(1000), _members(1001),                     # the top level has no limit
    '{"a": ' + _members(1000) + '}', '{"a": ' + _members(1001) + '}',
    '[' + _members(1001) + ']',
    '{"a": ' + _members(1001) + ', "b": {"c": 1, "c": 2}}',  # oversized, then a duplicate
    '{"b": {"c": 1, "c": 2}, "a": ' + _members(1001) + '}',
    '{"a": ' + _members(1001)[:-1] + ', "k5": 0}}',      # oversized and a duplicate in one
    '{"a": [' + _members(1001) + ', ' + _members(1002) + ']}',
    '{"a": 1, "b": {"a": 1}, "c": [{"a": 1, "b": 2.5}]}',
]


@pytest.mark.parametrize("text", PARSE_TEXTS, ids=range(len(PARSE_TEXTS)))
def test_the_parse_with_one_decoder_agrees_with_the_definition(text):
    from service.api.body import _parse

    assert _parsed(_parse, text) == _parsed(_reference_parse, text)


def test_one_decoder_per_thread_parses_alike_across_threads():
    import threading

    from service.api.body import _parse

    texts = [PARSE_TEXTS[n % len(PARSE_TEXTS)] for n in range(200)]
    expected = [_parsed(_reference_parse, t) for t in texts]
    got: dict[int, list] = {}

    def work(k):
        got[k] = [_parsed(_parse, t) for t in texts]

    threads = [threading.Thread(target=work, args=(k,)) for k in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert all(got[k] == expected for k in range(4))


# ---- the Accept header, the finite check and the metrics ------------------------------------


@pytest.mark.parametrize("accept, status, csv", [
    (None, 200, False), ("", 200, False), ("*/*", 200, False),
    ("application/json", 200, False), ("text/csv", 200, True),
    ("text/csv;q=0.5, application/json", 200, False),
    ("application/json;q=0.1, text/csv;q=0.9", 200, True),
    ("text/*", 200, True), ("image/png", 406, False),
])
def test_an_accept_header_answers_alike_the_first_time_and_after(client, accept, status, csv):
    body = {"basis": "standard-ultimate", "items": [{"lives": [{"age": 65}],
                                                     "timing": "advance"}]}
    headers = {} if accept is None else {"Accept": accept}
    views._BEST_OF_ACCEPT.clear()
    for _ in range(2):
        answer = client.post("/v1/annuity-factors", json=body, headers=headers)
        assert answer.status_code == status
        if status == 200:
            assert answer.mimetype == ("text/csv" if csv else "application/json")


def test_a_value_not_finite_is_named_however_many_items_there_are(app):
    import numpy as np

    for size in (1, 2, views._FEW, views._FEW + 1, 40):
        for bad in {0, size // 2, size - 1}:
            values = np.ones(size)
            values[bad] = np.nan
            with app.test_request_context(), pytest.raises(ProblemError) as exc:
                views._finite_items(values, list(range(100, 100 + size)))
            assert exc.value.errors == {f"items.{100 + bad}": ["The value is not finite."]}
        views._finite_items(np.ones(size), list(range(size)))  # all finite: no problem


def test_requests_and_factors_are_counted_in_their_series(client):
    from prometheus_client import REGISTRY

    def sample(name, labels):
        return REGISTRY.get_sample_value(name, labels) or 0.0

    series = {"route": "/v1/annuity-factors", "method": "POST", "status": "200"}
    factors = {"basis": "standard-ultimate@2026.1", "kind": "factor"}
    before = (sample("annuity_http_requests_total", series),
              sample("annuity_http_request_duration_seconds_count", series),
              sample("annuity_factors_computed_total", factors))
    body = {"basis": "standard-ultimate", "items": [{"lives": [{"age": 65}],
                                                     "timing": "advance"}] * 3}
    for _ in range(4):
        assert client.post("/v1/annuity-factors", json=body).status_code == 200
    after = (sample("annuity_http_requests_total", series),
             sample("annuity_http_request_duration_seconds_count", series),
             sample("annuity_factors_computed_total", factors))
    assert after[0] - before[0] == 4 and after[1] - before[1] == 4
    assert after[2] - before[2] == 12


# ---- the time of computation ----------------------------------------------------------------


@pytest.mark.parametrize("moment", [
    (2026, 12, 31, 23, 59, 59, 999999), (2026, 1, 2, 3, 4, 5, 0), (2026, 1, 2, 3, 4, 5, 7),
    (1999, 12, 31, 0, 0, 0, 500000), (2100, 2, 28, 12, 0, 9, 10),
])
def test_the_time_of_computation_is_written_as_strftime_writes_it(moment):
    from datetime import UTC, datetime

    at = datetime(*moment, tzinfo=UTC)
    assert audit.computed_at(at) == at.strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def test_the_gunicorn_configuration_freezes_the_start_up_objects_before_each_fork():
    import gc

    from tests.live.server import gunicorn_settings

    settings = gunicorn_settings()  # read, nothing started (the environment restored)
    gc.unfreeze()
    try:
        assert gc.get_freeze_count() == 0
        settings["pre_fork"](None, None)
        assert gc.get_freeze_count() > 0
    finally:
        gc.unfreeze()


# ---- the cash-flow schedule's body ----------------------------------------------------------

SCHEDULE_BODIES = [
    {"basis": "standard-ultimate", "item": {"lives": [{"age": 65}], "timing": "advance"}},
    {"basis": "standard-ultimate", "amount": 1200, "interest_rate": 0.03,
     "item": {"lives": [{"age": 65.25, "sex": "male"}], "timing": "arrears", "frequency": 12,
              "term_months": 18}},
    {"basis": "fernhollow-annuitants", "valuation_date": "2026-12-31",
     "item": {"lives": [{"date_of_birth": "1958-03-14", "sex": "female"}, {"age": 60}],
              "timing": "advance", "survivorship": "last-survivor"}},
    {"basis": "standard-ultimate", "item": {"lives": [{"age": 65}], "timing": "sideways"}},
    {"basis": "standard-ultimate", "item": {"lives": [{"age": 65}], "timing": "advance"},
     "amount": -1},
    {"basis": "standard-ultimate", "item": {"lives": [{"age": 65}], "timing": "advance"},
     "colour": "blue"},
    {"basis": "standard-ultimate", "items": [{"lives": [{"age": 65}], "timing": "advance"}]},
    {"basis": "standard-ultimate", "item": {"lives": [{"age": 140}], "timing": "advance"}},
    [1, 2],
]


@pytest.mark.parametrize("body", SCHEDULE_BODIES, ids=range(len(SCHEDULE_BODIES)))
def test_a_schedule_answers_alike_with_and_without_fast_loading(client, monkeypatch, body):
    fast = client.post("/v1/cash-flow-schedules", json=copy.deepcopy(body))
    with monkeypatch.context() as m:
        m.setattr(fastload, "fast_loader", lambda schema: None)
        slow = client.post("/v1/cash-flow-schedules", json=copy.deepcopy(body))
    assert fast.status_code == slow.status_code
    a, b = fast.get_json(), slow.get_json()
    for answer in (a, b):
        answer.pop("request_id", None)
        (answer.get("audit") or {}).pop("request_id", None)
        (answer.get("audit") or {}).pop("computed_at", None)
    assert a == b


def test_a_plain_schedule_body_is_loaded_fast():
    loader = fastload.fast_loader(views._schedule_request)
    body = copy.deepcopy(SCHEDULE_BODIES[1])
    assert loader is not None
    assert loader.load(body) == views._schedule_request.load(copy.deepcopy(body))


@pytest.mark.parametrize("length", ["0", "107", "4194304", "007", " 12", "12 ", "+12", "-3",
                                    "1_000", "1.5", "", "abc", "\u0661\u0662", "\u00b2",
                                    "9" * 18, "9" * 19, "99999999999999999999", "1" * 5000])
@pytest.mark.parametrize("encoding", [None, "chunked", "gzip", "gzip, chunked"])
def test_the_content_length_is_read_as_werkzeug_reads_it(length, encoding):
    # werkzeug.wsgi.get_content_length is the definition; a run of ASCII digits is read
    # directly, everything else by werkzeug itself.
    from werkzeug.wsgi import get_content_length

    from service.api.body import content_length

    environ = {"CONTENT_LENGTH": length}
    if encoding is not None:
        environ["HTTP_TRANSFER_ENCODING"] = encoding
    assert content_length(environ) == get_content_length(environ)
    assert content_length({}) is None


def test_the_request_state_holds_the_request_and_the_app_however_it_is_made(app, client):
    from flask import current_app, request, request_finished

    with app.test_request_context("/v1/annuity-factors", method="POST"):
        state = current()  # made on first use (no before_request ran)
        assert state.http is request._get_current_object()
        assert state.app is current_app._get_current_object()
        assert current() is state
    seen = []

    def _look(sender, response, **extra):
        state = current()
        seen.append((state.http is request._get_current_object(),
                     state.app is current_app._get_current_object()))

    with request_finished.connected_to(_look, app):
        assert client.get("/livez").status_code == 200
    assert seen == [(True, True)]


def test_each_plain_function_s_sync_check_is_made_once_and_agrees_with_flask_s(app,
                                                                               monkeypatch):
    from flask import Flask

    def plain():
        return "plain"

    async def coroutine():
        return "coroutine"

    asked = []
    flask_check = Flask.ensure_sync
    monkeypatch.setattr(Flask, "ensure_sync",
                        lambda self, func: asked.append(func) or flask_check(self, func))
    assert app.ensure_sync(plain) is plain
    assert app.ensure_sync(plain) is plain
    assert asked == [plain]  # (Flask asked once, the answer kept)
    monkeypatch.undo()
    # A coroutine function gets what Flask gives it (a wrapper, or Flask's own error when
    # the async extra is not installed), each time.
    for _ in range(2):
        try:
            expected = Flask.ensure_sync(app, coroutine)
        except RuntimeError as exc:
            with pytest.raises(RuntimeError, match=re.escape(str(exc))):
                app.ensure_sync(coroutine)
        else:
            assert app.ensure_sync(coroutine) is not coroutine
            assert expected is not coroutine
    bound = _Holder().method
    assert app.ensure_sync(bound) == bound  # (a bound method is made anew: not kept)


class _Holder:
    def method(self):
        return None


def test_a_valuation_is_made_once_per_interest_structure_and_methods():
    curve = Curve.flat(0.0375)
    same = views._valuation_of(curve, "udd", "exact")
    assert views._valuation_of(curve, "udd", "exact") is same
    assert (same.interest, same.fractional_age, same.approximation) == (curve, "udd", "exact")
    assert same.curve is curve
    other = views._valuation_of(curve, "constant-force", "exact")
    assert other is not same and other.fractional_age == "constant-force"
    twin = Curve.flat(0.0375)  # an equal structure, another object: its own entry
    assert views._valuation_of(twin, "udd", "exact").interest is twin


def test_values_given_as_a_list_are_checked_as_an_array_is(app):
    import numpy as np

    for size in (1, 3, views._FEW + 2):
        for bad in {0, size - 1}:
            values = [1.0] * size
            values[bad] = math.inf
            places = list(range(7, 7 + size))
            problems = []
            for given in (values, np.array(values)):
                with app.test_request_context(), pytest.raises(ProblemError) as exc:
                    views._finite_items(given, places)
                problems.append(exc.value.errors)
            assert problems[0] == problems[1] == {f"items.{7 + bad}": ["The value is not finite."]}
        views._finite_items([1.0] * size, list(range(size)))
