"""The fast loader of batch items against marshmallow, the contract's one source.

The reference throughout is marshmallow's own ``schema.load`` (service/api/schemas.py): for
every item the fast loader either returns exactly what ``schema.load`` returns (the same
values, the same keys in the same order) or declines, and a batch answers the same whether
items are loaded fast or each through marshmallow as before: the same 422 (every error path,
message, detail and count) in reject mode, and the same results and refusals in per-item
mode. Request ids and timestamps are the only parts that may differ.
"""

import copy
import datetime
import json

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from marshmallow import ValidationError

from service.api import fastload, views
from service.api.body import load
from service.api.problems import ProblemError
from service.api.schemas import InsuranceItemSchema, ItemSchema, ProjectionItemSchema

GOOD = [
    {"lives": [{"age": 65}], "timing": "advance"},
    {"lives": [{"age": 65.25}], "timing": "arrears", "frequency": 12, "term": 10.0},
    {"id": "policy-1", "lives": [{"age": 0}], "timing": "continuous", "term": 200},
    {"id": "x" * 64, "lives": [{"age": 200.0, "age_adjustment": -50}], "timing": "advance"},
    {"lives": [{"age": 70, "sex": "female", "duration": 0, "mortality_multiplier": 0,
                "flat_extra": 1}], "timing": "advance", "frequency": 365, "deferral": 0},
    {"lives": [{"age": 70, "sex": "blend-60.40", "duration": None}], "timing": "advance"},
    {"lives": [{"age": 60, "age_adjustment": 50, "mortality_multiplier": 100,
                "flat_extra": 0.0}], "timing": "advance", "escalation": -0.5},
    {"lives": [{"age": 60}], "timing": "advance", "escalation": 1, "guarantee": 5,
     "term": 10},
    {"lives": [{"age": 60}], "timing": "advance", "frequency": 12, "term_months": 1},
    {"lives": [{"age": 60}], "timing": "advance", "frequency": 12, "term_months": 2400,
     "deferral_months": 0, "guarantee_months": 24},
    {"lives": [{"age": 60}], "timing": "continuous", "term": 0.3, "deferral": 0.7,
     "guarantee": 0.1},
    {"lives": [{"age": 60}], "timing": "advance", "term": None, "start_requires": "first"},
    {"lives": [{"age": 60}, {"age": 57.5, "sex": "male"}], "timing": "advance",
     "survivorship": "joint-life", "start_requires": "both"},
    {"lives": [{"age": 60}, {"age": 57}], "timing": "arrears", "frequency": 4,
     "survivorship": {"both": 1, "first_only": 0.5, "second_only": 0.6667}},
    {"lives": [{"age": 60}, {"age": 57}], "timing": "continuous",
     "survivorship": "reversionary"},
    {"lives": [{"age": 60}], "timing": "advance", "measures": []},
    {"lives": [{"age": 60}], "timing": "advance",
     "measures": ["duration", "convexity", "key_rate_durations"]},
    {"lives": [{"age": 60}], "timing": "advance", "spread": {"percentiles": [5, 50, 95]}},
    {"lives": [{"age": 60}], "timing": "advance", "spread": {"percentiles": [100]}},
    {"lives": [{"date_of_birth": "1958-03-14"}], "timing": "advance"},
    {"lives": [{"date_of_birth": "1960-02-29", "sex": "male"}, {"age": 60}],
     "timing": "advance", "survivorship": "last-survivor"},
]

BAD = [
    {},
    {"timing": "advance"},
    {"lives": [{"age": 65}]},
    {"lives": [{"age": 65}], "timing": "advance", "colour": "blue"},
    {"lives": [{"age": 65, "height": 1.8}], "timing": "advance"},
    {"lives": [], "timing": "advance"},
    {"lives": [{"age": 1}, {"age": 2}, {"age": 3}], "timing": "advance",
     "survivorship": "joint-life"},
    {"lives": {"age": 65}, "timing": "advance"},
    {"lives": [65], "timing": "advance"},
    {"lives": [{}], "timing": "advance"},
    {"lives": [{"age": None}], "timing": "advance"},
    {"lives": [{"age": True}], "timing": "advance"},
    {"lives": [{"age": "65"}], "timing": "advance"},
    {"lives": [{"age": -0.01}], "timing": "advance"},
    {"lives": [{"age": 200.0001}], "timing": "advance"},
    {"lives": [{"age": 10**400}], "timing": "advance"},
    {"lives": [{"age": 65, "date_of_birth": "1958-03-14"}], "timing": "advance"},
    {"lives": [{"date_of_birth": "1958-02-30"}], "timing": "advance"},
    {"lives": [{"date_of_birth": "14/03/1958"}], "timing": "advance"},
    {"lives": [{"date_of_birth": 1958}], "timing": "advance"},
    {"lives": [{"age": 65, "sex": ""}], "timing": "advance"},
    {"lives": [{"age": 65, "sex": "Female"}], "timing": "advance"},
    {"lives": [{"age": 65, "sex": "a" * 65}], "timing": "advance"},
    {"lives": [{"age": 65, "sex": 1}], "timing": "advance"},
    {"lives": [{"age": 65, "duration": 1.0}], "timing": "advance"},
    {"lives": [{"age": 65, "duration": True}], "timing": "advance"},
    {"lives": [{"age": 65, "duration": -1}], "timing": "advance"},
    {"lives": [{"age": 65, "age_adjustment": 50.5}], "timing": "advance"},
    {"lives": [{"age": 65, "mortality_multiplier": None}], "timing": "advance"},
    {"lives": [{"age": 65, "flat_extra": 1.01}], "timing": "advance"},
    {"lives": [{"age": 65, "flat_extra": False}], "timing": "advance"},
    {"lives": [{"age": 65}], "timing": "sometimes"},
    {"lives": [{"age": 65}], "timing": None},
    {"lives": [{"age": 65}], "timing": "advance", "frequency": 0},
    {"lives": [{"age": 65}], "timing": "advance", "frequency": 366},
    {"lives": [{"age": 65}], "timing": "advance", "frequency": 12.0},
    {"lives": [{"age": 65}], "timing": "advance", "frequency": True},
    {"lives": [{"age": 65}], "timing": "advance", "frequency": None},
    {"lives": [{"age": 65}], "timing": "advance", "term": 0},
    {"lives": [{"age": 65}], "timing": "advance", "term": 200.5},
    {"lives": [{"age": 65}], "timing": "advance", "term": 10.5},
    {"lives": [{"age": 65}], "timing": "advance", "frequency": 12, "term": 0.1},
    {"lives": [{"age": 65}], "timing": "advance", "term": "10"},
    {"lives": [{"age": 65}], "timing": "advance", "deferral": -1},
    {"lives": [{"age": 65}], "timing": "advance", "deferral": None},
    {"lives": [{"age": 65}], "timing": "advance", "deferral": 2.5},
    {"lives": [{"age": 65}], "timing": "advance", "guarantee": 20, "term": 10},
    {"lives": [{"age": 65}], "timing": "continuous", "guarantee": 10.5, "term": 10},
    {"lives": [{"age": 65}], "timing": "advance", "term": 10, "term_months": 120},
    {"lives": [{"age": 65}], "timing": "advance", "term_months": 0},
    {"lives": [{"age": 65}], "timing": "advance", "term_months": 2401},
    {"lives": [{"age": 65}], "timing": "advance", "term_months": 7},
    {"lives": [{"age": 65}], "timing": "advance", "deferral_months": 1.0},
    {"lives": [{"age": 65}], "timing": "advance", "guarantee_months": -1},
    {"lives": [{"age": 65}], "timing": "advance", "guarantee": 1, "guarantee_months": 12},
    {"lives": [{"age": 65}], "timing": "advance", "escalation": 1.5},
    {"lives": [{"age": 65}], "timing": "advance", "escalation": True},
    {"lives": [{"age": 65}], "timing": "advance", "survivorship": "joint-life"},
    {"lives": [{"age": 65}, {"age": 60}], "timing": "advance"},
    {"lives": [{"age": 65}, {"age": 60}], "timing": "advance", "survivorship": "joint"},
    {"lives": [{"age": 65}, {"age": 60}], "timing": "advance", "survivorship": 1},
    {"lives": [{"age": 65}, {"age": 60}], "timing": "advance",
     "survivorship": {"both": 1, "first_only": 2, "second_only": 0}},
    {"lives": [{"age": 65}, {"age": 60}], "timing": "advance",
     "survivorship": {"both": 1, "first_only": 1}},
    {"lives": [{"age": 65}], "timing": "advance", "measures": ["duration", "beta"]},
    {"lives": [{"age": 65}], "timing": "advance", "measures": "duration"},
    {"lives": [{"age": 65}], "timing": "advance",
     "measures": ["duration", "duration", "convexity", "key_rate_durations"]},
    {"lives": [{"age": 65}], "timing": "advance", "measures": None},
    {"lives": [{"age": 65}], "timing": "advance", "spread": {"percentiles": []}},
    {"lives": [{"age": 65}], "timing": "advance", "spread": {"percentiles": [0]}},
    {"lives": [{"age": 65}], "timing": "advance", "spread": {"percentiles": [50, True]}},
    {"lives": [{"age": 65}], "timing": "advance", "spread": {"levels": [50]}},
    {"lives": [{"age": 65}], "timing": "advance", "spread": [50]},
    {"lives": [{"age": 65}], "timing": "advance", "spread": None},
    {"lives": [{"age": 65}], "timing": "advance", "start_requires": "neither"},
    {"id": "", "lives": [{"age": 65}], "timing": "advance"},
    {"id": "x" * 65, "lives": [{"age": 65}], "timing": "advance"},
    {"id": 7, "lives": [{"age": 65}], "timing": "advance"},
    {"id": None, "lives": [{"age": 65}], "timing": "advance"},
    [{"lives": [{"age": 65}], "timing": "advance"}],
    "an item",
    None,
]

INSURANCE = [
    {"lives": [{"age": 50}], "cover": "whole-life"},
    {"lives": [{"age": 50}], "cover": "term", "term": 10, "benefit_timing": "end-of-period",
     "frequency": 12, "escalation": 0.02},
    {"lives": [{"age": 50}], "cover": "endowment", "term_months": 120, "deferral_months": 6},
    {"lives": [{"age": 50}, {"age": 48}], "cover": "whole-life", "on": "second-death"},
    {"lives": [{"age": 50}], "cover": "term"},
    {"lives": [{"age": 50}, {"age": 48}], "cover": "whole-life"},
    {"lives": [{"age": 50}], "cover": "whole-life", "on": "first-death"},
    {"lives": [{"age": 50}], "cover": "term", "term": 10, "term_months": 120},
    {"lives": [{"age": 50}], "cover": "life"},
    {"lives": [{"age": 50}], "cover": "whole-life", "benefit_timing": "now"},
    {"lives": [{"age": 50}], "cover": "whole-life", "timing": "advance"},
]

PROJECTION = [
    {"lives": [{"age": 66}], "timing": "advance", "frequency": 12, "amount": 12000},
    {"lives": [{"age": 66}], "timing": "advance", "amount": 0},
    {"lives": [{"age": 66}], "timing": "advance"},
    {"lives": [{"age": 66}], "timing": "advance", "amount": -1},
    {"lives": [{"age": 66}], "timing": "advance", "amount": 1e13},
    {"lives": [{"age": 66}], "timing": "advance", "amount": True},
]


def _marshmallow(schema, item):
    """``schema.load(item)``, or None when it refuses the item."""
    try:
        return schema.load(copy.deepcopy(item))
    except ValidationError:
        return None


def _same(fast, slow) -> bool:
    """The same value with the same keys in the same order, at every depth."""
    if isinstance(slow, dict):
        return isinstance(fast, dict) and list(fast) == list(slow) and all(
            _same(fast[k], slow[k]) for k in slow)
    if isinstance(slow, list | tuple):
        return type(fast) is type(slow) and len(fast) == len(slow) and all(
            _same(a, b) for a, b in zip(fast, slow, strict=True))
    return type(fast) is type(slow) and fast == slow


@pytest.mark.parametrize("schema_class, corpus", [
    (ItemSchema, GOOD + BAD), (InsuranceItemSchema, INSURANCE),
    (ProjectionItemSchema, PROJECTION)])
def test_the_fast_loader_gives_marshmallows_answer_or_declines(schema_class, corpus):
    schema = schema_class()
    loader = fastload.fast_loader(schema)
    assert loader is not None  # else every item would go through marshmallow
    for item in corpus:
        slow = _marshmallow(schema, item)
        fast = loader.load(copy.deepcopy(item))
        if slow is None:
            assert fast is None, item
        else:
            assert fast is None or _same(fast, slow), (item, fast, slow)


def test_the_fast_loader_vouches_for_every_plain_good_item():
    """Without this the comparisons above could pass with a loader that always declines."""
    schema = ItemSchema()
    loader = fastload.fast_loader(schema)
    for item in GOOD:
        assert _marshmallow(schema, item) is not None, item  # the corpus is good
        assert loader.load(copy.deepcopy(item)) is not None, item
    for item in BAD:
        assert _marshmallow(schema, item) is None, item  # the corpus is bad


def test_the_loader_leaves_the_item_as_it_was():
    item = {"lives": [{"age": 60}], "timing": "advance", "frequency": 12, "term_months": 24}
    before = copy.deepcopy(item)
    fastload.fast_loader(ItemSchema()).load(item)
    assert item == before


_NUMBERS = st.one_of(st.integers(-5, 420), st.floats(-5, 420, allow_nan=False),
                     st.sampled_from([0, 0.5, 1, 12, 200, 10**400, True, False, None, "1"]))
_LIFE = st.fixed_dictionaries({}, optional={
    "age": _NUMBERS, "sex": st.sampled_from(["female", "male", "", "X", None, 3]),
    "duration": _NUMBERS, "age_adjustment": _NUMBERS, "mortality_multiplier": _NUMBERS,
    "flat_extra": st.sampled_from([0, 0.005, 1, 1.5, -0.1, None, True]),
    "date_of_birth": st.sampled_from(["1958-03-14", "1958-02-30", "x", None, 1958]),
    "other": st.just(1)})
_ITEM = st.fixed_dictionaries({}, optional={
    "id": st.one_of(st.text(max_size=70), st.integers(), st.none()),
    "lives": st.one_of(st.lists(_LIFE, max_size=3), _LIFE),
    "timing": st.sampled_from(["advance", "arrears", "continuous", "never", None, 1]),
    "frequency": _NUMBERS, "term": _NUMBERS, "deferral": _NUMBERS, "guarantee": _NUMBERS,
    "term_months": _NUMBERS, "deferral_months": _NUMBERS, "guarantee_months": _NUMBERS,
    "escalation": st.sampled_from([0, 0.02, -0.5, 1, 1.01, True, None]),
    "survivorship": st.one_of(
        st.sampled_from(["joint-life", "last-survivor", "reversionary", "both", 1, None]),
        st.fixed_dictionaries({}, optional={"both": _NUMBERS, "first_only": _NUMBERS,
                                            "second_only": _NUMBERS})),
    "measures": st.one_of(st.lists(st.sampled_from(
        ["duration", "convexity", "key_rate_durations", "beta", 1]), max_size=4), st.none()),
    "spread": st.one_of(st.fixed_dictionaries({"percentiles": st.lists(_NUMBERS,
                                                                       max_size=3)}),
                        st.none(), st.just([5])),
    "start_requires": st.sampled_from(["any", "first", "both", "all"]),
    "unknown": st.just(0)})


@settings(max_examples=400, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(_ITEM)
def test_generated_items_load_alike(item):
    schema = _SCHEMA
    slow = _marshmallow(schema, item)
    fast = fastload.fast_loader(schema).load(copy.deepcopy(item))
    if slow is None:
        assert fast is None
    else:
        assert fast is None or _same(fast, slow)


_SCHEMA = ItemSchema()


# ---- whole batches checked as columns -------------------------------------------------------


def _batch_agrees(schema, items):
    """``load_batch`` gives what marshmallow gives item by item (the loaded items, their
    places and the refusals' messages) and leaves the items as they were; return the mask
    of the items it vouched for as columns."""
    before = copy.deepcopy(items)
    loaded, places, errors = fastload.load_batch(schema, items)
    assert items == before
    expected, messages = [], {}
    for n, item in enumerate(before):
        try:
            expected.append((n, schema.load(copy.deepcopy(item))))
        except ValidationError as exc:
            messages[n] = exc.messages
    assert places == [n for n, _ in expected]
    assert all(_same(out, slow) for out, (_, slow) in zip(loaded, expected, strict=True))
    assert errors == messages
    plan = fastload.fields_plan(schema)
    dicts = [copy.deepcopy(item) for item in before if type(item) is dict]
    return plan.load(dicts)[1] if plan is not None and dicts else None


@pytest.mark.parametrize("schema_class, corpus", [
    (ItemSchema, GOOD + BAD), (ItemSchema, BAD + GOOD), (InsuranceItemSchema, INSURANCE),
    (ProjectionItemSchema, PROJECTION), (ProjectionItemSchema, PROJECTION[::-1])])
def test_the_batch_loader_gives_marshmallows_answers(schema_class, corpus):
    _batch_agrees(schema_class(), copy.deepcopy(corpus))


def test_the_batch_loader_checks_plain_items_as_columns():
    """Without this the comparisons could pass with a batch loader that vouches for none:
    the plain items (one life, scalar fields) of the good corpus are vouched for as columns,
    and every bad item is sent one by one."""
    plain = [item for item in GOOD if len(item["lives"]) == 1 and not {
        "measures", "spread", "term_months", "deferral_months", "guarantee_months"} & set(
        item)]
    assert len(plain) >= 10
    assert any("date_of_birth" in item["lives"][0] for item in plain)  # (dates as columns)
    bad = _batch_agrees(ItemSchema(), copy.deepcopy(plain))
    assert not bad.any()
    dicts = [item for item in BAD if type(item) is dict]
    assert _batch_agrees(ItemSchema(), copy.deepcopy(dicts)).all()
    assert fastload.fields_plan(ProjectionItemSchema()) is not None
    # A schema-level rule without a batch form keeps its schema out of the column path.
    assert fastload.fields_plan(InsuranceItemSchema()) is None


def test_dates_of_birth_are_read_as_a_column_as_marshmallow_reads_them():
    # Each distinct date string is read once by the field itself; the good ones are vouched
    # for as columns, the bad ones (no such day, not ISO, not a string, with an age too,
    # neither) sent one by one, where marshmallow words them.
    dates = ["1958-03-14", "1958-03-14", "1960-02-29", "1958-02-30", "14/03/1958", 1958,
             "1958-3-4", None]
    items = [{"lives": [{"date_of_birth": d, "sex": "male"}], "timing": "advance"}
             for d in dates]
    items += [{"lives": [{"age": 65.0, "date_of_birth": "1958-03-14"}], "timing": "advance"},
              {"lives": [{"age": 65.0}], "timing": "advance"}]
    one_by_one = _batch_agrees(ItemSchema(), items).tolist()  # (True: not vouched for)
    assert one_by_one[:3] == [False, False, False]
    assert one_by_one[3:6] == [True, True, True] and one_by_one[7:9] == [True, True]
    assert one_by_one[9] is False


def test_the_batch_loader_stops_at_the_first_refusal_as_before():
    items = [*GOOD[:3], BAD[13], *GOOD[:2], BAD[2]]
    fast = fastload.load_batch(_SCHEMA, copy.deepcopy(items), stop_at_first=True)
    slow = fastload.load_items(_SCHEMA, copy.deepcopy(items), stop_at_first=True)
    assert fast[1] == slow[1] == [0, 1, 2] and fast[2] == slow[2]
    assert all(_same(a, b) for a, b in zip(fast[0], slow[0], strict=True))


_PERIODS = st.one_of(_NUMBERS, st.sampled_from(
    [1 / 12, 5 / 12, 10.5, 0.25, 10 + 1e-10, 10 + 5e-9, 10 + 2e-8, 200.0, 1e-300, -0.0]))
_PLAIN_LIFE = st.fixed_dictionaries({"age": _NUMBERS}, optional={
    "sex": st.sampled_from(["female", "male", "", "X", None, 3, "blend-60.40"]),
    "duration": _NUMBERS, "age_adjustment": _NUMBERS, "mortality_multiplier": _NUMBERS,
    "flat_extra": st.sampled_from([0, 0.005, 1, 1.5, -0.1, None, True]),
    "date_of_birth": st.sampled_from([None, "1958-03-14"])})
_PLAIN_ITEM = st.fixed_dictionaries(
    {"lives": st.lists(_PLAIN_LIFE, min_size=1, max_size=1),
     "timing": st.sampled_from(["advance", "arrears", "continuous", "never"])},
    optional={"id": st.one_of(st.text(max_size=66), st.none()),
              "frequency": st.sampled_from([1, 2, 4, 12, 365, 0, 366, 12.0, True, None]),
              "term": st.one_of(_PERIODS, st.none()), "deferral": _PERIODS,
              "guarantee": _PERIODS, "term_months": st.sampled_from([1, 12, 7, 0]),
              "escalation": st.sampled_from([0, 0.02, -0.5, 1, 1.01, True, None]),
              "start_requires": st.sampled_from(["any", "first", "all"]),
              "survivorship": st.just("joint-life"), "measures": st.just([])})


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(st.one_of(_PLAIN_ITEM, _PLAIN_ITEM, _ITEM), min_size=2, max_size=12))
def test_generated_batches_load_alike(items):
    _batch_agrees(_SCHEMA, items)


@settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(_PLAIN_ITEM, min_size=2, max_size=12),
       st.one_of(_NUMBERS, st.just(1000.0), st.just(12)))
def test_generated_projection_batches_load_alike(items, amount):
    _batch_agrees(ProjectionItemSchema(), [item | {"amount": amount} for item in items])


# ---- whole requests: the fast path against marshmallow alone --------------------------------


def _old_load_whole(schema, item_schema, body, build):
    """The batch read as before the fast loader: the whole body by the schema."""
    try:
        return load(schema, body)
    except ProblemError as exc:
        raise views._with_basis_errors(exc, schema, item_schema, body, build) from None


def _without_ids(body):
    """The answer bar its request id and time of computation."""
    body = copy.deepcopy(body)
    body.pop("request_id", None)
    audit = body.get("audit") or {}
    audit.pop("request_id", None)
    audit.pop("computed_at", None)
    return body


def _both_ways(client, monkeypatch, path, body):
    fast = client.post(path, json=copy.deepcopy(body))
    with monkeypatch.context() as m:
        m.setattr(fastload, "fast_loader", lambda schema: None)
        m.setattr(fastload, "fields_plan", lambda schema: None)
        m.setattr(views, "_load_whole", _old_load_whole)
        slow = client.post(path, json=copy.deepcopy(body))
    return fast, slow


def _batch(items, **extra):
    return {"basis": "standard-ultimate", "valuation_date": "2026-12-31", "items": items,
            **extra}


@pytest.mark.parametrize("on_error", ["reject", "per-item"])
@pytest.mark.parametrize("corpus", ["good", "bad", "mixed", "one bad"])
def test_a_batch_answers_the_same_either_way(client, monkeypatch, on_error, corpus):
    mixed = [x for pair in zip(GOOD, BAD[:len(GOOD)], strict=True) for x in pair]
    items = {"good": GOOD, "bad": BAD, "mixed": mixed,
             "one bad": [*GOOD, BAD[11], *GOOD]}[corpus]
    # standard-ultimate is unisex and has no blended table: the blend is refused by the basis.
    fast, slow = _both_ways(client, monkeypatch, "/v1/annuity-factors",
                            _batch(items, on_error=on_error))
    assert fast.status_code == slow.status_code
    assert _without_ids(fast.get_json()) == _without_ids(slow.get_json())
    if corpus != "good" and on_error == "reject":
        assert fast.status_code == 422


def test_a_batch_with_many_bad_items_lists_the_same_first_paths(client, monkeypatch):
    items = [{"lives": [{"age": 300 + n}], "timing": "advance", "frequency": 0}
             for n in range(150)]
    fast, slow = _both_ways(client, monkeypatch, "/v1/annuity-factors", _batch(items))
    assert fast.status_code == slow.status_code == 422
    assert _without_ids(fast.get_json()) == _without_ids(slow.get_json())
    answer = fast.get_json()
    assert len(answer["errors"]) == 100 and "Checking stopped" in answer["detail"]


@pytest.mark.parametrize("body", [
    _batch(GOOD[:3], interest_rate="5%"),
    _batch(GOOD[:3], extra=1),
    _batch([]),
    _batch(GOOD[:3] + BAD[:3], interest_rate=2.0),
    {"items": GOOD[:3]},
    [GOOD[0]],
    _batch([GOOD[0], None, GOOD[1]]),
    _batch([GOOD[0], None], on_error="per-item"),
    _batch({"0": GOOD[0]}, on_error="per-item"),
])
def test_request_level_problems_answer_the_same(client, monkeypatch, body):
    fast, slow = _both_ways(client, monkeypatch, "/v1/annuity-factors", body)
    assert fast.status_code == slow.status_code == 422
    assert _without_ids(fast.get_json()) == _without_ids(slow.get_json())


@pytest.mark.parametrize("on_error", ["reject", "per-item"])
@pytest.mark.parametrize("path, items, extra", [
    ("/v1/insurance-factors", INSURANCE, {}),
    ("/v1/cash-flow-projections", PROJECTION, {"buckets": "annual"}),
])
def test_other_batches_answer_the_same(client, monkeypatch, on_error, path, items, extra):
    fast, slow = _both_ways(client, monkeypatch, path,
                            _batch(items, on_error=on_error, **extra))
    assert fast.status_code == slow.status_code
    assert _without_ids(fast.get_json()) == _without_ids(slow.get_json())


# ---- the answer: method blocks encoded once -------------------------------------------------


def _answer_body(results):
    return {"results": results, "valued": 3, "refused": 1, "warnings": [],
            "audit": {"request_id": "r"}}


def test_results_with_shared_method_blocks_encode_as_jsonify_does(app, monkeypatch):
    exact = {"evaluation": "sum \u00e9 \"quoted\"", "fractional_age": "udd",
             "approximation": "exact", "discounting": "v^t"}
    other = exact | {"approximation": "woolhouse-3"}
    results = [{"id": "a", "value": 1.5, "method": exact},
               {"value": 2.0, "rounded": 2.0, "ages": [None, 61.5], "method": other},
               None,
               {"id": "b", "problem": {"title": "t", "errors": {"x": ["y"]}}},
               {"id": "c", "value": -0.0, "method": exact}]
    with app.test_request_context():
        fast = views._results_json(_answer_body(results))
        plain = views.jsonify(_answer_body(results))
        assert fast.get_data() == plain.get_data()
        assert fast.mimetype == plain.mimetype
        # An id spelling the placeholder itself is counted, and the body encoded plainly.
        monkeypatch.setattr(views.secrets, "token_hex", lambda n: "f" * 2 * n)
        sly = [*results, {"id": "\x00" + "f" * 16 + ".0", "value": 1.0, "method": exact}]
        assert views._results_json(_answer_body(sly)).get_data() == \
            views.jsonify(_answer_body(sly)).get_data()


# ---- engine items held as columns -----------------------------------------------------------


def _both_item_forms(client, monkeypatch, body):
    fast = client.post("/v1/annuity-factors", json=copy.deepcopy(body))
    with monkeypatch.context() as m:
        m.setattr(views, "_column_items", lambda *args: None)
        slow = client.post("/v1/annuity-factors", json=copy.deepcopy(body))
    return fast, slow


_PLAIN_MIX = [
    {"id": "a", "lives": [{"age": 65.5}], "timing": "advance", "frequency": 12,
     "guarantee": 5.0},
    {"lives": [{"age": 40.25, "sex": "male", "duration": 1, "mortality_multiplier": 1.5,
                "flat_extra": 0.002, "age_adjustment": 2}], "timing": "arrears",
     "frequency": 4, "term": 10, "deferral": 2.5, "escalation": 0.02},
    {"lives": [{"age": 70}], "timing": "continuous", "term": 5},
    {"lives": [{"age": 66}], "timing": "advance", "spread": {"percentiles": [50]}},
    {"lives": [{"age": 66}], "timing": "advance", "start_requires": "first"},
    {"lives": [{"age": 60}, {"age": 57}], "timing": "advance", "survivorship": "joint-life"},
    {"lives": [{"date_of_birth": "1958-03-14"}], "timing": "advance", "frequency": 2},
    {"lives": [{"age": 64}], "timing": "advance", "frequency": 12, "term_months": 18},
    {"lives": [{"age": 140}], "timing": "advance"},  # outside the table: refused
    {"lives": [{"age": 5, "age_adjustment": -10}], "timing": "arrears"},  # so is this
    {"lives": [{"age": 80, "sex": "blend-60.40"}], "timing": "advance"},  # no such table
    {"lives": [{"age": 45}], "timing": "arrears", "frequency": 365, "term": 1},
    {"lives": [{"age": 58.75, "duration": 0}], "timing": "continuous", "frequency": 12,
     "term": 20.5, "deferral": 1.3, "guarantee": 4.2, "escalation": 0.03},
]


@pytest.mark.parametrize("on_error", ["reject", "per-item"])
@pytest.mark.parametrize("basis", ["standard-ultimate", "fernhollow-annuitants"])
@pytest.mark.parametrize("which", ["all", "plain", "good"])
def test_items_held_as_columns_answer_byte_for_byte_as_objects(client, monkeypatch, on_error,
                                                                basis, which):
    """The answer (values, refusals, warnings, their order) does not depend on whether the
    plain items reach the engine as columns or as objects."""
    items = {"all": _PLAIN_MIX, "plain": [_PLAIN_MIX[n] for n in (0, 1, 11, 0, 1)],
             "good": [x for n, x in enumerate(_PLAIN_MIX) if n not in (8, 9, 10)]}[which]
    if basis != "standard-ultimate":  # sex-distinct: every life names its table
        items = [item | {"lives": [{"sex": "female"} | life for life in item["lives"]]}
                 for item in items]
    body = _batch(items, on_error=on_error, basis=basis)
    fast, slow = _both_item_forms(client, monkeypatch, body)
    assert fast.status_code == slow.status_code
    assert _without_ids(fast.get_json()) == _without_ids(slow.get_json())
    strip = [_without_ids(r.get_json()) for r in (fast, slow)]
    assert json.dumps(strip[0]) == json.dumps(strip[1])
    if which != "all":
        assert fast.status_code == 200, fast.get_json()


_CONTINUOUS = [
    {"lives": [{"age": 58.75, "duration": 0}], "timing": "continuous", "frequency": 12,
     "term": 20.5, "deferral": 1.3, "guarantee": 4.2, "escalation": 0.03},
    {"lives": [{"age": 70}], "timing": "continuous"},
    {"lives": [{"age": 66.1, "mortality_multiplier": 1.4}], "timing": "continuous",
     "deferral_months": 7, "guarantee": 10.0},
    {"lives": [{"age": 81.5, "sex": "male"}], "timing": "continuous", "term_months": 30,
     "escalation": -0.01},
    {"lives": [{"age": 64}], "timing": "advance", "frequency": 12, "term": 10},
    {"lives": [{"age": 60}, {"age": 57}], "timing": "continuous",
     "survivorship": "joint-life"},
]


@pytest.mark.parametrize("rate", [None, 0.0, -0.01])
def test_continuous_items_held_as_columns_answer_as_the_general_path(client, monkeypatch,
                                                                      rate):
    """Continuous single-life items ride as columns and are valued on shared chains; the
    answer is the general path's (each value to 1e-12 relative, the rest identical)."""
    from service.engine import columns

    body = _batch(_CONTINUOUS, **({} if rate is None else {"interest_rate": rate}))
    fast = client.post("/v1/annuity-factors", json=copy.deepcopy(body))
    with monkeypatch.context() as m:
        m.setattr(columns, "dispatch", lambda *args, **kwargs: None)
        slow = client.post("/v1/annuity-factors", json=copy.deepcopy(body))
    assert fast.status_code == slow.status_code == 200, fast.get_json()
    got, want = _without_ids(fast.get_json()), _without_ids(slow.get_json())
    values = [[r.pop("value") for r in body["results"]] for body in (got, want)]
    assert got == want  # method blocks, ids, warnings
    assert values[0] == pytest.approx(values[1], rel=1e-12, abs=0)


def test_plain_items_are_held_as_columns(app):
    """Without this the comparison above could pass with no item ever held as columns."""
    from service.engine.columns import ItemBatch

    items = [fastload.load_items(_SCHEMA, [copy.deepcopy(x)])[0][0] for x in _PLAIN_MIX]
    with app.test_request_context():
        basis = app.extensions["registry"].resolve("standard-ultimate")
        dated = datetime.date(2026, 12, 31)
        objects, _, _ = views._engine_items(basis, copy.deepcopy(items), dated)
        batch, refused, _ = views._column_items(basis, items, dated)
    assert isinstance(batch, ItemBatch)
    # (6 gave a date of birth; 7 its term in months; 2 and 12 are continuous, their frequency
    # ignored)
    assert batch.rows.tolist() == [0, 1, 2, 6, 7, 11, 12]
    assert sorted(refused) == [8, 9, 10]  # ages outside the table, no such table
    # Each place gives the engine item the object path builds, and the same ages recorded.
    assert list(batch) == objects and batch[-1] == objects[-1]
    assert items[6]["ages"] == [objects[6].lives[0].age]


def test_lives_on_a_generational_basis_are_held_as_columns_in_their_cohorts(app):
    """Under a generational scale each life follows its cohort's table: the columns place
    every life (by age or by date of birth) in the table the object path gives it."""
    from service.engine.columns import ItemBatch

    raw = [{"lives": [{"age": 50 + 0.7 * k, "sex": ("female", "male")[k % 2]}],
            "timing": "advance", "frequency": 12} for k in range(30)]
    raw += [{"lives": [{"date_of_birth": f"19{40 + k}-0{1 + k % 9}-1{k % 10}",
                        "sex": ("female", "male")[k % 2]}], "timing": "arrears"}
            for k in range(30)]
    items = [fastload.load_items(_SCHEMA, [copy.deepcopy(x)])[0][0] for x in raw]
    with app.test_request_context():
        basis = app.extensions["registry"].resolve("fernhollow-pensioners@2026.1")
        dated = datetime.date(2026, 12, 31)
        objects, _, object_tables = views._engine_items(basis, copy.deepcopy(items), dated)
        batch, refused, column_tables = views._column_items(basis, items, dated)
    assert isinstance(batch, ItemBatch) and not refused
    assert batch.rows.tolist() == list(range(60))
    for got, want in zip(batch, objects, strict=True):
        assert got.lives[0].age == want.lives[0].age
        # The same cohort table (each request builds its own list, in its own order).
        assert column_tables[got.lives[0].table] is object_tables[want.lives[0].table]


@pytest.mark.parametrize("items", [[], [1], [None], [{}, None, 3], {"a": 1}, "x", None,
                                   [GOOD[0]] * 3, [[None]], (1, 2)])
@pytest.mark.parametrize("capped", [True, False])
def test_the_request_with_its_items_raw_loads_as_a_list_of_raw_fields(items, capped):
    """The request's own fields are loaded with the items left raw (RawItems); the answer is
    that of the plain ``fields.List(fields.Raw())`` it stands for."""
    from marshmallow import fields, validate

    from service.api.body import validate_capped
    from service.api.schemas import FactorRequestSchema

    plain = FactorRequestSchema.from_dict({"items": fields.List(
        fields.Raw(), required=True, validate=validate.Length(min=1))})()
    body = {"basis": "standard-ultimate", "items": items}

    def answer(schema):
        if capped:
            return validate_capped(schema, copy.deepcopy(body))
        try:
            return schema.load(copy.deepcopy(body))
        except ValidationError as exc:
            return exc.messages

    assert answer(views._top_schema(views._factor_request)) == answer(plain)
