"""Two-life items given as columns (service.engine.joint_columns.JointColumns, through
service.engine.columns.value_columns) against the general path and closed forms.

The general path (``value_annuities(..., fast=False)``) sums every payment date: amount x
v^t x (ab P(both) + a1 P(first only) + a2 P(second only)); its own tests check it against
direct references. Here the same items given as columns (from a mapping, a pandas
DataFrame or Item objects) must agree with it to 1e-12 relative, keep the method codes and
the places of rows with one and two lives, raise the same errors with the same paths and
honour the same limits; constant-q lives give geometric closed forms.
"""

import time

import numpy as np
import pandas as pd
import pytest

from service.bases.registry import load_registry
from service.engine.annuity import (
    EXACT_SUM,
    INTEGRAL,
    WOOLHOUSE_SUM,
    Item,
    Life,
    Payments,
    Valuation,
    value_annuities,
)
from service.engine.columns import Columns, value_columns
from service.engine.curves import Curve
from service.engine.errors import DeadlineError, ItemError, WorkLimitError
from service.engine.joint_columns import JOINT_FIELDS, JointColumns, problems
from tests.engine.test_joint_columns import (
    BAD,
    MIXED,
    REQUIREMENTS,
    SHAPES,
    _constant_tables,
    _geometric,
    _random_pairs,
    _valid,
)
from tests.reference import models

ASSUMPTIONS = ("udd", "constant-force", "balducci")
RTOL = 1e-12
Q1, Q2 = 0.05, 0.08  # as _constant_tables


@pytest.fixture(scope="module")
def bases():
    return [b for b in load_registry("tables").listing() if b.interest.kind == "flat"]


def _rate(basis):
    return basis.interest.rates[0]


def _frame(items):
    """The items as a DataFrame of the column names (NaN second-life fields for one life)."""
    rows = []
    for item in items:
        a, p = item.lives[0], item.payments
        row = {"table": a.table, "age": a.age, "duration": a.duration,
               "age_adjustment": a.age_adjustment, "mortality_multiplier":
               a.mortality_multiplier, "flat_extra": a.flat_extra, "timing": p.timing,
               "frequency": p.frequency, "term": p.term, "deferral": p.deferral,
               "guarantee": p.guarantee, "escalation": p.escalation,
               "both": item.survivorship[0], "first_only": item.survivorship[1],
               "second_only": item.survivorship[2], "start_requires": item.start_requires}
        if len(item.lives) == 2:
            b = item.lives[1]
            row |= {"table2": b.table, "age2": b.age, "duration2": b.duration,
                    "age_adjustment2": b.age_adjustment,
                    "mortality_multiplier2": b.mortality_multiplier,
                    "flat_extra2": b.flat_extra}
        else:
            row |= {"table2": None, "age2": None, "duration2": None, "age_adjustment2": 0.0,
                    "mortality_multiplier2": 1.0, "flat_extra2": 0.0}
        rows.append(row)
    return pd.DataFrame(rows)


def _assert_same(tables, items, valuation, given=None):
    """Columns of ``items`` (``given``, else built from them) value as the general path."""
    cols = JointColumns.from_items(items) if given is None else given
    got = value_columns(tables, cols, valuation)
    general = value_annuities(tables, items, valuation, fast=False)
    np.testing.assert_allclose(got.value, general.value, rtol=RTOL, atol=0)
    assert got.method_code.tolist() == general.method_code.tolist()
    assert got.methods == general.methods
    return got


def _with_singles(rng, tables, pairs, share=0.3):
    """Pairs with some single-life items among them (each survivorship shape kept)."""
    out = []
    for item in pairs:
        if rng.random() < share:
            out.append(Item((item.lives[0],), item.payments, item.survivorship,
                            item.start_requires))
        out.append(item)
    return out


@pytest.mark.parametrize("assumption", ASSUMPTIONS)
def test_random_batches_as_columns_agree_with_the_general_path(bases, assumption):
    rng = np.random.default_rng(41_000 + ASSUMPTIONS.index(assumption))
    for basis in bases:
        valuation = Valuation(_rate(basis), assumption, basis.approximation)
        items = _random_pairs(rng, basis.tables, 150)
        items = _valid(basis.tables, _with_singles(rng, basis.tables, items), valuation)
        assert sum(len(i.lives) == 2 for i in items) > 100
        assert any(len(i.lives) == 1 for i in items)
        frame = _frame(items)
        _assert_same(basis.tables, items, valuation)
        _assert_same(basis.tables, items, valuation, frame)
        _assert_same(basis.tables, items, valuation,
                     {name: frame[name].to_numpy() for name in frame.columns})


@pytest.mark.parametrize("rate", [0.0, 0.04, -0.01])
def test_annual_pairs_under_udd_as_a_mapping_agree(bases, rate):
    # The cumulative-column valuation (annual, UDD), from plain arrays.
    rng = np.random.default_rng(41_100 + int(rate * 100))
    for basis in bases:
        valuation = Valuation(rate, "udd")
        items = _valid(basis.tables, _random_pairs(rng, basis.tables, 120, (1,)), valuation)
        frame = _frame(items)
        _assert_same(basis.tables, items, valuation,
                     {name: frame[name].to_numpy() for name in frame.columns})


@pytest.mark.parametrize("assumption", ASSUMPTIONS)
@pytest.mark.parametrize("requires", REQUIREMENTS)
@pytest.mark.parametrize("shape", SHAPES)
def test_each_shape_and_start_requirement(assumption, requires, shape):
    tables = [models.susm_select()]
    pays = [Payments(), Payments("arrears", 4, term=15.0, deferral=2.5, escalation=0.02),
            Payments("advance", 12, guarantee=5.0, deferral=3.0),
            Payments("continuous", 1, deferral=2.0)]
    lives = [(Life(65.0), Life(62.0)), (Life(70.5, duration=1), Life(81.25)),
             (Life(100.0), Life(30.0, mortality_multiplier=1.5, flat_extra=0.01))]
    items = [Item(pair, p, shape, requires) for pair in lives for p in pays]
    given = JointColumns.from_dict({
        "age": [i.lives[0].age for i in items], "age2": [i.lives[1].age for i in items],
        "duration": [i.lives[0].duration for i in items],
        "mortality_multiplier2": [i.lives[1].mortality_multiplier for i in items],
        "flat_extra2": [i.lives[1].flat_extra for i in items],
        "timing": [i.payments.timing for i in items],
        "frequency": [i.payments.frequency for i in items],
        "term": [i.payments.term for i in items],
        "deferral": [i.payments.deferral for i in items],
        "guarantee": [i.payments.guarantee for i in items],
        "escalation": [i.payments.escalation for i in items],
        "both": shape[0], "first_only": shape[1], "second_only": shape[2],
        "start_requires": REQUIREMENTS.index(requires)})  # (as a code, broadcast)
    assert given.to_items() == items
    got = _assert_same(tables, items, Valuation(0.04, assumption), given)
    assert got.method_code.tolist() == [INTEGRAL if i.payments.timing == "continuous"
                                        else EXACT_SUM for i in items]


def test_rows_with_one_and_two_lives_keep_places_codes_and_methods():
    tables = [models.susm()]
    items = MIXED
    for approximation in ("exact", "woolhouse-2", "woolhouse-3"):
        valuation = Valuation(0.04, approximation=approximation)
        got = _assert_same(tables, items, valuation)
        assert got.method_code[2] == got.method_code[3] == INTEGRAL
        if approximation != "exact":  # m > 1 under Woolhouse: the general path's
            assert got.method_code[0] == got.method_code[1] == WOOLHOUSE_SUM
        assert got.method_code[5] == got.method_code[7] == EXACT_SUM
        # Each item alone gives its own value: the places are kept.
        for n, item in enumerate(items):
            alone = value_annuities(tables, [item], valuation, fast=False)
            assert got.value[n] == pytest.approx(alone.value[0], rel=RTOL)


def test_single_life_rows_alone_value_as_columns():
    # Rows that all have one life (age2 NaN) value exactly as the same Columns.
    tables = [models.susm()]
    ages = np.array([55.0, 63.5, 71.25, 88.0])
    joint = value_columns(tables, {"age": ages, "age2": np.nan, "frequency": 12},
                          Valuation(0.03))
    single = value_columns(tables, Columns.from_dict({"age": ages, "frequency": 12}),
                           Valuation(0.03))
    np.testing.assert_array_equal(joint.value, single.value)


@pytest.mark.parametrize("assumption", ASSUMPTIONS)
@pytest.mark.parametrize("timing", ["advance", "arrears"])
def test_constant_q_columns_are_geometric(assumption, timing):
    # Independent lives with constant q1, q2 at whole ages: k_p = p^k at whole times, so
    # the joint whole-life annuity is sum v^k (p1 p2)^k and the last survivor adds
    # sum v^k (p1^k + p2^k - (p1 p2)^k) (geometric series from the definition).
    tables = _constant_tables()
    rate = 0.04
    v = 1 / (1 + rate)
    p1, p2 = 1 - Q1, 1 - Q2
    advance = timing == "advance"
    joint = _geometric(v * p1 * p2, advance=advance)
    last = _geometric(v * p1, advance=advance) + _geometric(v * p2, advance=advance) - joint
    rev = _geometric(v * p2, advance=advance) - joint  # to the second, while the first is dead
    got = value_columns(tables, {"age": [40.0] * 3, "table": 0, "age2": [47.0, 47.0, 52.0],
                                 "table2": 1, "timing": timing, "both": [1, 1, 0],
                                 "first_only": [0, 1, 0], "second_only": [0, 1, 1]},
                        Valuation(rate, assumption)).value
    assert got[0] == pytest.approx(joint, rel=1e-13)
    assert got[1] == pytest.approx(last, rel=1e-13)
    assert got[2] == pytest.approx(rev, rel=1e-12)


def test_from_dict_frame_and_items_round_trip(bases):
    basis = next(b for b in bases if b.id == "standard-select")
    rng = np.random.default_rng(41_300)
    valuation = Valuation(_rate(basis), "udd")
    items = _random_pairs(rng, basis.tables, 60)
    items = _valid(basis.tables, _with_singles(rng, basis.tables, items, 0.5), valuation)
    from_items = JointColumns.from_items(items)
    from_frame = JointColumns.from_frame(_frame(items))
    assert from_items.to_items() == items
    assert from_frame.to_items() == items
    assert JointColumns.from_items(from_frame.to_items()).to_items() == items
    for name in (*JOINT_FIELDS,):
        np.testing.assert_array_equal(getattr(from_frame, name), getattr(from_items, name))
    sub = from_items.take(np.arange(0, len(items), 3))
    assert sub.to_items() == items[::3]


def test_joint_columns_are_frozen_and_refuse_what_they_cannot_hold():
    cols = JointColumns.from_dict({"age": [60.0, 70.0], "age2": [58.0, None]})
    assert cols.two.tolist() == [True, False]
    assert cols.start_requires.tolist() == [0, 0]
    assert cols.amounts.tolist() == [[1.0, 1.0, 1.0]] * 2
    with pytest.raises(ValueError):
        cols.age2[0] = 1.0
    with pytest.raises(ValueError, match="unknown columns"):
        JointColumns.from_dict({"age": [60.0], "sex2": ["female"]})
    with pytest.raises(ValueError, match="table2"):
        JointColumns.from_dict({"age": [60.0], "age2": [61.0], "table2": [0.5]})
    with pytest.raises(ValueError):
        JointColumns.from_items([Item((Life(60.0), Life(58.0), Life(50.0)), Payments())])
    codes = JointColumns.from_dict({"age": [60.0] * 4, "age2": 61.0,
                                    "start_requires": ["any", "first", "both", "second"]})
    assert codes.start_requires.tolist() == [0, 1, 2, -1]
    assert codes.to_items()[3].start_requires not in REQUIREMENTS


def _columns_can_hold(item):
    """Columns hold whole-number frequencies (a float 2.0 is read as 2) and two lives."""
    return len(item.lives) <= 2 and type(item.payments.frequency) is int


@pytest.mark.parametrize("assumption", ASSUMPTIONS)
def test_the_same_errors_as_the_general_path(assumption):
    tables = [models.susm_select()]
    valuation = Valuation(0.05, assumption)
    good = Item((Life(65.5), Life(63.0)), Payments("advance", 12))
    single = Item((Life(70.0),), Payments())
    bad_single = [Item((Life(60.0, mortality_multiplier=-1.0),), Payments()),
                  Item((Life(60.0),), Payments(), (1.0, 2.0, 1.0)),  # (checked for one life)
                  Item((Life(131.0),), Payments())]
    listed = [bad for bad in BAD if _columns_can_hold(bad)] + bad_single
    assert len(listed) == len(BAD) - 2 + len(bad_single)
    refused = 0
    for bad in listed:
        for batch in ([good, single, bad, good], [good, bad], [bad]):
            cols = JointColumns.from_items(batch)
            try:
                value_annuities(tables, batch, valuation, fast=False)
                general = None
            except ItemError as exc:
                general = exc.errors
            assert (problems(tables, cols, valuation) or None) == general
            if general is None:
                continue
            refused += 1
            with pytest.raises(ItemError) as caught:
                value_columns(tables, cols, valuation)
            assert caught.value.errors == general
            with pytest.raises(ItemError) as caught:
                value_columns(tables, _frame(batch), valuation)
            assert caught.value.errors == general
    # (under UDD a life half a year past its integer age with q = 1 is alive: 1 - 0.5 q)
    assert refused == 3 * (len(listed) - (assumption == "udd"))
    # All at once, with good items among them: the general path's stages decide.
    batch = [single, *listed, good]
    with pytest.raises(ItemError) as general:
        value_annuities(tables, batch, valuation, fast=False)
    with pytest.raises(ItemError) as caught:
        value_columns(tables, JointColumns.from_items(batch), valuation)
    assert caught.value.errors == general.value.errors
    assert any(".lives.1." in path for path in general.value.errors)
    # Only the lives' problems (the item checks pass): the later stage, placed in the batch.
    later = [single, good, BAD[0], good, BAD[7]]
    with pytest.raises(ItemError) as general:
        value_annuities(tables, later, valuation, fast=False)
    with pytest.raises(ItemError) as caught:
        value_columns(tables, JointColumns.from_items(later), valuation)
    assert caught.value.errors == general.value.errors
    assert set(caught.value.errors) == {"2.lives.1.age", "4.lives.1.age"}


def test_work_limit_and_deadline_are_honoured():
    tables = [models.susm()]
    couples = [Item((Life(40.0), Life(42.0)), Payments("advance", 12, guarantee=5.0))] * 3
    valuation = Valuation(0.04)
    cols = JointColumns.from_items(couples)
    # The general path's units: its payment dates, one per year of a guarantee.
    with pytest.raises(WorkLimitError) as general:
        value_annuities(tables, couples, valuation, max_work=1, fast=False)
    work = general.value.work
    value_columns(tables, cols, valuation, max_work=work)
    with pytest.raises(WorkLimitError) as caught:
        value_columns(tables, cols, valuation, max_work=work - 1)
    assert (caught.value.work, caught.value.limit) == (work, work - 1)
    with pytest.raises(DeadlineError):
        value_columns(tables, cols, valuation, deadline=time.monotonic() - 1)


def test_pairs_under_a_curve_go_to_the_general_path():
    # Interest other than one flat rate: the general path values every row.
    tables = [models.susm_select()]
    curve = Curve.from_mapping({"kind": "segments", "edges": [5.5], "rates": [0.03, 0.06]})
    valuation = Valuation(curve, "udd")
    items = [Item((Life(60.0 + k, duration=k % 3), Life(58.5 + k / 2)),
                  Payments("advance", 1 + k % 2, term=None if k % 3 else 20.0),
                  SHAPES[k % len(SHAPES)], REQUIREMENTS[k % 3]) for k in range(21)]
    _assert_same(tables, items, valuation)
    _assert_same(tables, items, valuation, _frame(items))
