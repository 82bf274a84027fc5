"""The column path (service.engine.columns) against the general path and closed forms.

The general path (``value_annuities(..., fast=False)``) sums every payment date: amount x v^t
x t_p_x; its own tests check it against direct references. Here the column path, which sums
years of age on shared chains, must agree with it to 1e-12 relative on every shipped basis,
every fractional-age assumption and every option it covers, raise the same errors, and honour
the same limits.
"""

import math
import time

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.bases.registry import load_registry
from service.engine.annuity import (
    EXACT_SUM,
    INTEGRAL,
    Item,
    Life,
    Payments,
    Valuation,
    value_annuities,
)
from service.engine.columns import Columns, problems, value_columns
from service.engine.errors import DeadlineError, ItemError, WorkLimitError
from tests.engine.paths import assert_same as _assert_same
from tests.engine.paths import errors_both_ways
from tests.engine.paths import valid as _valid
from tests.reference import models

ASSUMPTIONS = ("udd", "constant-force", "balducci")
FREQUENCIES = (1, 2, 4, 12, 52, 365)
RTOL = 1e-12


@pytest.fixture(scope="module")
def bases():
    return load_registry("tables").listing()


def _rate(basis):
    return basis.interest.rates[0] if basis.interest.kind == "flat" else 0.03


def _random_items(rng, tables, n):
    """Single-life discrete items with every option: fractional ages (some on a payment
    date, some at the table's last age), select durations, multipliers, flat extras,
    deferral, term, guarantee, escalation, every frequency, both timings."""
    items = []
    for _ in range(n):
        ti = int(rng.integers(0, len(tables)))
        table = tables[ti]
        m = int(rng.choice(FREQUENCIES))
        age = float(rng.uniform(table.first_age, table.last_age))
        if rng.random() < 0.2:  # on a payment date of the age's year
            age = min(math.floor(age) + int(rng.integers(0, m)) / m, float(table.last_age))
        if rng.random() < 0.05:
            age = float(table.last_age)
        duration = None
        if table.select_period and rng.random() < 0.5:
            duration = int(rng.integers(0, table.select_period + 2))
            lo = table.select_first_age + duration
            hi = min(table.select_last_age + duration, table.last_age)
            age = float(rng.uniform(lo, hi + 0.999)) if hi >= lo else age
            age = min(age, float(table.last_age))
            if not lo <= math.floor(age) <= hi and duration < table.select_period:
                duration = None
        term = None if rng.random() < 0.4 else (int(rng.integers(0, 40))
                                                 + int(rng.integers(1, m + 1)) / m)
        guarantee = 0.0
        if rng.random() < 0.4:
            guarantee = int(rng.integers(0, 15 * m)) / m
            if term is not None:
                guarantee = min(guarantee, term)
        deferral = int(rng.integers(0, 12 * m)) / m if rng.random() < 0.3 else 0.0
        life = Life(age, table=ti, duration=duration,
                    age_adjustment=float(rng.choice([0.0, 0.0, -2.0, 1.5])),
                    mortality_multiplier=float(rng.choice([1.0, 1.0, 0.0, 0.5, 1.5, 25.0])),
                    flat_extra=float(rng.choice([0.0, 0.0, 0.002, 0.05])))
        items.append(Item((life,), Payments(str(rng.choice(["advance", "arrears"])), m, term,
                                            deferral, guarantee,
                                            float(rng.choice([0.0, 0.02, -0.01, 0.05])))))
    return items


@pytest.mark.parametrize("assumption", ASSUMPTIONS)
def test_random_items_on_every_basis_agree_with_the_general_path(bases, assumption):
    rng = np.random.default_rng(20260 + ASSUMPTIONS.index(assumption))
    for basis in bases:
        valuation = Valuation(_rate(basis), assumption)
        items = _valid(basis.tables, _random_items(rng, basis.tables, 150), valuation)
        assert len(items) > 100
        _assert_same(basis.tables, items, valuation)


@st.composite
def _item(draw):
    m = draw(st.sampled_from(FREQUENCIES))
    periods = st.integers(0, 30 * m)
    term = draw(st.none() | st.integers(1, 40 * m).map(lambda k: k / m))
    guarantee = draw(periods) / m
    if term is not None:
        guarantee = min(guarantee, term)
    life = Life(draw(st.floats(20, 110)), duration=draw(st.none() | st.integers(0, 3)),
                mortality_multiplier=draw(st.sampled_from([1.0, 0.0, 0.7, 3.0])),
                flat_extra=draw(st.sampled_from([0.0, 0.01])))
    return Item((life,), Payments(draw(st.sampled_from(["advance", "arrears"])), m, term,
                                  draw(periods) / m, guarantee,
                                  draw(st.sampled_from([0.0, 0.03, -0.02]))))


@settings(max_examples=60, deadline=None)
@given(st.lists(_item(), min_size=1, max_size=8), st.sampled_from(ASSUMPTIONS),
       st.sampled_from([0.0, 0.04, -0.01]))
def test_drawn_items_agree_with_the_general_path(items, assumption, rate):
    # The Standard Select Survival Model (select ages 20 to 118): durations 0 to 3 at ages
    # 20 to 110 are all valid selections.
    # Lives a multiplier makes dead at their age are refused by both, with the same errors.
    tables, valuation = [models.susm_select()], Valuation(rate, assumption)
    items = _valid(tables, items, valuation)
    if items:
        _assert_same(tables, items, valuation)


@pytest.mark.parametrize("assumption", ASSUMPTIONS)
@pytest.mark.parametrize("m", FREQUENCIES)
@pytest.mark.parametrize("timing", ["advance", "arrears"])
def test_edges_agree(assumption, m, timing):
    table = models.susm_short()  # closes at 105
    last = float(table.last_age)
    items = [
        Item((Life(last),), Payments(timing, m)),  # at the last age
        Item((Life(last - 1 + (m - 1) / m),), Payments(timing, m)),  # a period before it
        Item((Life(103.0, mortality_multiplier=50.0),), Payments(timing, m)),  # q = 1 early
        Item((Life(90.0),), Payments(timing, m, guarantee=30.0)),  # guarantee past the end
        Item((Life(60.25),), Payments(timing, m, term=1 / m)),  # one payment
        Item((Life(60.0),), Payments(timing, m, deferral=50.0)),  # deferred past the end
        Item((Life(100.0, flat_extra=1.0),), Payments(timing, m)),  # dies within the year
    ]
    _assert_same([table], items, Valuation(0.045, assumption))


def test_a_term_annuity_without_deaths_is_the_annuity_certain():
    # With a multiplier of 0 nobody dies before the table's last age: a 20-year term paid
    # monthly in advance at 4%, escalating 3% a year, is sum_k 1.03^k v^k a-due^(12)_1 with
    # a-due^(12)_1 = (1 - v) / d^(12), d^(12) = 12 (1 - v^(1/12)) (standard annuity-certain
    # formulas, common practice), computed here in plain Python.
    v = 1 / 1.04
    year = (1 - v) / (12 * (1 - v ** (1 / 12)))
    expected = sum(1.03**k * v**k for k in range(20)) * year
    cols = Columns.from_dict({"age": [50.4], "mortality_multiplier": [0.0], "frequency": [12],
                              "term": [20.0], "escalation": [0.03]})
    got = value_columns([models.susm()], cols, Valuation(0.04))
    assert got.value[0] == pytest.approx(expected, rel=1e-13)
    assert got.method_code.tolist() == [EXACT_SUM]


def test_the_guarantee_given_alive_at_the_deferral():
    # Deferred 5 years, then 10 years certain in arrears annually: 5_p_x v^5 a-angle_10 when
    # nobody dies after the deferral (multiplier 0 is not enough: the deaths before it must
    # count). Use a flat extra of 0.1 and a multiplier of 0: q = 0.1 every year before the
    # last age, so 5_p_x = 0.9^5 for an integer age (hand-worked).
    v = 1 / 1.05
    certain = sum(v**k for k in range(1, 11))
    expected = 0.9**5 * v**5 * certain
    cols = {"age": [60.0], "mortality_multiplier": [0.0], "flat_extra": [0.1],
            "timing": ["arrears"], "deferral": [5.0], "guarantee": [10.0], "term": [10.0]}
    got = value_columns([models.susm()], cols, Valuation(0.05))
    assert got.value[0] == pytest.approx(expected, rel=1e-13)


def _frame(items):
    rows = []
    for item in items:
        life, p = item.lives[0], item.payments
        rows.append({"table": life.table, "age": life.age, "duration": life.duration,
                     "age_adjustment": life.age_adjustment,
                     "mortality_multiplier": life.mortality_multiplier,
                     "flat_extra": life.flat_extra, "timing": p.timing,
                     "frequency": p.frequency, "term": p.term, "deferral": p.deferral,
                     "guarantee": p.guarantee, "escalation": p.escalation})
    return pd.DataFrame(rows)


def test_frame_items_and_dict_give_the_same_columns_and_values(bases):
    basis = next(b for b in bases if b.id == "standard-select")
    rng = np.random.default_rng(7)
    valuation = Valuation(_rate(basis), "udd")
    items = _valid(basis.tables, _random_items(rng, basis.tables, 200), valuation)
    frame = _frame(items)
    from_frame = Columns.from_frame(frame)
    from_items = Columns.from_items(items)
    from_dict = Columns.from_dict({name: frame[name].to_numpy() for name in frame.columns})
    for name in ("table", "age", "duration", "timing", "frequency", "term", "guarantee"):
        np.testing.assert_array_equal(getattr(from_frame, name), getattr(from_items, name))
        np.testing.assert_array_equal(getattr(from_dict, name), getattr(from_items, name))
    by_frame = value_columns(basis.tables, frame, valuation).value
    by_items = value_columns(basis.tables, from_items, valuation).value
    np.testing.assert_array_equal(by_frame, by_items)
    general = value_annuities(basis.tables, items, valuation, fast=False).value
    np.testing.assert_allclose(by_frame, general, rtol=RTOL, atol=0)
    assert from_items.to_items() == [
        Item((Life(i.lives[0].age, i.lives[0].table, i.lives[0].duration,
                   i.lives[0].age_adjustment, i.lives[0].mortality_multiplier,
                   i.lives[0].flat_extra),), i.payments) for i in items]


def test_columns_are_frozen_and_refuse_what_they_cannot_hold():
    cols = Columns.from_dict({"age": [60.0, 70.0]})
    with pytest.raises(ValueError):
        cols.age[0] = 1.0
    assert Columns.from_dict({"age": [60.0], "timing": ["continuous"]}).timing.tolist() == [2]
    with pytest.raises(ValueError, match="unknown columns"):
        Columns.from_dict({"age": [60.0], "sex": ["female"]})
    with pytest.raises(ValueError):
        Columns.from_items([Item((Life(60.0), Life(58.0)), Payments())])
    assert len(cols) == 2 and cols.term.tolist() == [math.inf, math.inf]


#: Items the general path refuses, each with what makes it impossible.
BAD = [
    Item((Life(60.0),), Payments("advance", 12, term=0.0)),  # term 0
    Item((Life(60.0),), Payments("advance", 12, term=10.05)),  # not whole months
    Item((Life(60.0),), Payments("arrears", 12, deferral=-1.0)),
    Item((Life(60.0),), Payments("advance", 4, term=5.0, guarantee=6.0)),
    Item((Life(60.0),), Payments("advance", 400)),
    Item((Life(60.0),), Payments("advance", 1, escalation=-1.5)),
    Item((Life(10.0),), Payments("advance", 1)),  # below the table
    Item((Life(131.0),), Payments("advance", 1)),  # above it
    Item((Life(60.0, mortality_multiplier=-1.0),), Payments()),
    Item((Life(60.0, flat_extra=1.5),), Payments()),
    Item((Life(60.0, duration=1),), Payments()),  # (fine on an ultimate table)
    Item((Life(20.0, duration=2),), Payments()),  # selected at 18: not in the select table
    Item((Life(60.0, table=3),), Payments()),
    Item((Life(60.0, age_adjustment=math.nan),), Payments()),
    Item((Life(60.0),), Payments("weekly", 1)),
]


@pytest.mark.parametrize("assumption", ASSUMPTIONS)
def test_the_same_errors_as_the_general_path(assumption):
    tables = [models.susm_select()]
    valuation = Valuation(0.05, assumption)
    good = Item((Life(65.5),), Payments("advance", 12))
    # Each bad item alone among good ones, in the middle of a batch, with a two-life item.
    for bad in BAD:
        batch = [good, Item((Life(60.0), Life(61.0)), Payments()), bad, good]
        got = errors_both_ways(tables, batch, valuation)
        assert got[0] == got[1]
        single = [item for item in batch if len(item.lives) == 1]
        if got[1] is not None:
            cols = Columns.from_items(single)
            try:
                value_annuities(tables, single, valuation, fast=False)
                raise AssertionError("the general path accepted it")
            except ItemError as exc:
                assert problems(tables, cols, assumption) == exc.errors
                with pytest.raises(ItemError) as caught:
                    value_columns(tables, cols, valuation)
                assert caught.value.errors == exc.errors
    # All at once.
    got = []
    for fast in (True, False):
        with pytest.raises(ItemError) as caught:
            value_annuities(tables, BAD + [good], valuation, fast=fast)
        got.append(caught.value.errors)
    assert got[0] == got[1]


def test_a_life_dead_at_its_age_is_refused_as_by_the_general_path():
    # A flat extra of 1 under a constant force: a life past its integer age is dead.
    tables = [models.susm()]
    items = [Item((Life(60.5, flat_extra=1.0),), Payments())]
    valuation = Valuation(0.05, "constant-force")
    with pytest.raises(ItemError) as fast:
        value_annuities(tables, items, valuation)
    with pytest.raises(ItemError) as general:
        value_annuities(tables, items, valuation, fast=False)
    assert fast.value.errors == general.value.errors == {"0.lives.0.age": [
        "the life cannot be alive at this age under the adjusted table (survival from its "
        "integer age is 0)"]}


def test_mixed_batches_keep_order_codes_and_methods():
    tables = [models.susm()]
    items = [Item((Life(60.0),), Payments("advance", 12)),
             Item((Life(60.0), Life(55.0)), Payments("advance", 12), (1, 1, 0.5)),
             Item((Life(70.25),), Payments("continuous")),
             Item((Life(65.0),), Payments("arrears", 4, term=10.0))]
    for approximation in ("exact", "woolhouse-2"):
        got = _assert_same(tables, items, Valuation(0.04, approximation=approximation))
        assert got.method_code[2] == INTEGRAL


def test_work_limit_and_deadline_are_honoured():
    tables = [models.susm()]
    single = [Item((Life(40.0),), Payments("advance", 365))] * 10
    couple = [Item((Life(40.0), Life(40.0)), Payments("advance", 12))]
    valuation = Valuation(0.04)
    # Under UDD a single life costs one unit on the column path.
    value_annuities(tables, single, valuation, max_work=10)
    with pytest.raises(WorkLimitError) as caught:
        value_annuities(tables, single, valuation, max_work=9)
    assert (caught.value.work, caught.value.limit) == (10, 9)
    # With a couple, the general path's units for it plus one for each single life.
    with pytest.raises(WorkLimitError) as general:
        value_annuities(tables, couple, valuation, max_work=1)
    with pytest.raises(WorkLimitError) as both:
        value_annuities(tables, single + couple, valuation, max_work=general.value.work)
    assert both.value.work == general.value.work + 10
    with pytest.raises(WorkLimitError):
        value_columns(tables, {"age": [40.0] * 5}, valuation, max_work=4)
    with pytest.raises(DeadlineError):
        value_annuities(tables, single, valuation, deadline=time.monotonic() - 1)
    with pytest.raises(DeadlineError):
        value_columns(tables, {"age": [40.0]}, valuation, deadline=time.monotonic() - 1)


def test_items_off_the_column_path_are_valued_by_the_general_path():
    # A curve, or Woolhouse with m > 1: value_columns hands those items to the general path.
    tables = [models.susm()]
    cols = Columns.from_dict({"age": [60.0, 61.5], "frequency": [12, 1]})
    for valuation in (Valuation(0.04, approximation="woolhouse-3"),):
        got = value_columns(tables, cols, valuation)
        want = value_annuities(tables, cols.to_items(), valuation, fast=False)
        np.testing.assert_array_equal(got.method_code, want.method_code)
        np.testing.assert_allclose(got.value, want.value, rtol=RTOL)


@pytest.mark.parametrize("approximation", ["exact", "woolhouse-2"])
def test_a_batch_held_partly_as_columns_values_as_its_items(bases, approximation):
    """An ItemBatch (some places as columns, the others as objects) is valued exactly as the
    list of the items it stands for (the same code path on the same rows), and its places
    give those items back."""
    from service.engine.columns import ItemBatch

    basis = next(b for b in bases if b.id == "standard-ultimate")
    tables = basis.tables
    items = _random_items(np.random.default_rng(11), tables, 60)
    items[5] = Item((Life(age=60.0), Life(age=58.0)), Payments(frequency=12))
    items[17] = Item((Life(age=70.5),), Payments(timing="continuous", term=10.0))
    items[30] = Item((Life(age=66.0),), Payments(frequency=4), start_requires="first")
    valuation = Valuation(_rate(basis), basis.fractional_age, approximation)
    items = _valid(tables, items, valuation)
    held = [n for n, item in enumerate(items) if n % 3 and len(item.lives) == 1
            and item.payments.timing != "continuous" and item.start_requires == "any"]
    assert 30 <= len(held) < len(items) - 3
    batch = ItemBatch(len(items), np.array(held), Columns.from_items([items[n] for n in held]),
                      {n: items[n] for n in range(len(items)) if n not in held})
    assert list(batch) == items
    got = value_annuities(tables, batch, valuation)
    want = value_annuities(tables, items, valuation)
    assert got.value.tolist() == want.value.tolist()
    assert got.method_code.tolist() == want.method_code.tolist()
