"""Continuous payments on the column path (service.engine.continuous_columns) against the
general path and closed forms.

The general path (``value_annuities(..., fast=False)``) integrates rate x v^t x t_p_x segment
by segment; its own tests (tests/engine/test_continuous.py) check it against numerical
integration. Here the column path, which sums years of age on shared chains, must agree with
it to 1e-12 relative on every shipped basis, every fractional-age assumption and rate
(0, tiny, negative), report the same method (INTEGRAL), raise the same errors and honour the
same limits; and it must reproduce textbook closed forms computed in the test.
"""

import math
import time

import numpy as np
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
from service.engine.columns import Columns, ItemBatch, problems, value_columns
from service.engine.errors import DeadlineError, ItemError, WorkLimitError
from service.engine.tables import MortalityTable
from tests.engine.paths import assert_same
from tests.engine.paths import valid as _valid
from tests.reference import models

ASSUMPTIONS = ("udd", "constant-force", "balducci")
RATES = (0.04, 0.0, 1e-13, 1e-7, -0.02, -0.4, 0.25)
RTOL = 1e-12


@pytest.fixture(scope="module")
def bases():
    return load_registry("tables").listing()


def _random_items(rng, tables, n):
    """Single-life continuous items with every option: fractional ages (some within 1e-12
    or 1e-10 of a whole age, on either side, some at the table's last age), select
    durations, multipliers, flat extras, fractional deferrals, terms and guarantees (some on
    whole years, some ending past the table), escalations (negative too), any frequency
    (ignored)."""
    items = []
    for _ in range(n):
        ti = int(rng.integers(0, len(tables)))
        table = tables[ti]
        age = float(rng.uniform(table.first_age, table.last_age))
        if rng.random() < 0.25:  # near a whole age
            age = min(round(age) + float(rng.choice([0.0, -1e-12, 1e-12, -1e-10, 1e-10])),
                      float(table.last_age))
        elif rng.random() < 0.2:  # in whole months
            age = min(math.floor(age) + int(rng.integers(0, 12)) / 12, float(table.last_age))
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

        def years(top):
            return float(rng.choice([rng.uniform(0, top), int(rng.integers(0, top)),
                                     int(rng.integers(0, top)) + 0.5,
                                     int(rng.integers(0, 12 * top)) / 12]))

        term = None if rng.random() < 0.4 else max(years(45), 0.01)
        guarantee = years(20) if rng.random() < 0.4 else 0.0
        if term is not None:
            guarantee = min(guarantee, term)
        deferral = years(15) if rng.random() < 0.35 else 0.0
        life = Life(age, table=ti, duration=duration,
                    age_adjustment=float(rng.choice([0.0, 0.0, -2.0, 1.5, 0.3])),
                    mortality_multiplier=float(rng.choice([1.0, 1.0, 0.0, 0.5, 1.5, 25.0])),
                    flat_extra=float(rng.choice([0.0, 0.0, 0.002, 0.05])))
        items.append(Item((life,), Payments("continuous", int(rng.choice([1, 1, 4, 12, 400])),
                                            term, deferral, guarantee,
                                            float(rng.choice([0.0, 0.02, -0.01, 0.05])))))
    return items


def _assert_same(tables, items, valuation):
    fast = assert_same(tables, items, valuation)
    general = value_annuities(tables, items, valuation, fast=False)
    if all(len(item.lives) == 1 for item in items):
        by_columns = value_columns(tables, Columns.from_items(items), valuation)
        np.testing.assert_array_equal(by_columns.value, fast.value)
        assert by_columns.method_code.tolist() == general.method_code.tolist()
    return fast


def _column_path_used(monkeypatch):
    """Count the continuous items valued on shared chains (so that no comparison passes
    with every item on the general path)."""
    from service.engine import continuous_columns

    seen = []
    original = continuous_columns._value_chunk

    def spy(tables, cols, idx, *args):
        seen.append(idx.size)
        return original(tables, cols, idx, *args)

    monkeypatch.setattr(continuous_columns, "_value_chunk", spy)
    return seen


@pytest.mark.parametrize("assumption", ASSUMPTIONS)
@pytest.mark.parametrize("rate", RATES)
def test_random_items_on_every_basis_agree_with_the_general_path(bases, assumption, rate,
                                                                  monkeypatch):
    seen = _column_path_used(monkeypatch)
    rng = np.random.default_rng(31 + 7 * ASSUMPTIONS.index(assumption) + RATES.index(rate))
    for basis in bases:
        valuation = Valuation(rate, assumption)
        items = _valid(basis.tables, _random_items(rng, basis.tables, 80), valuation)
        assert len(items) > 50
        got = _assert_same(basis.tables, items, valuation)
        assert set(got.method_code.tolist()) == {INTEGRAL}
    assert sum(seen) > 50 * len(bases)


@st.composite
def _item(draw):
    years = st.floats(0, 30).map(lambda y: round(y, 2)) | st.integers(0, 30).map(float)
    term = draw(st.none() | st.floats(0.05, 40) | st.integers(1, 40).map(float))
    guarantee = draw(years)
    if term is not None:
        guarantee = min(guarantee, term)
    life = Life(draw(st.floats(20, 110) | st.integers(20, 110).map(float)),
                duration=draw(st.none() | st.integers(0, 3)),
                mortality_multiplier=draw(st.sampled_from([1.0, 0.0, 0.7, 3.0])),
                flat_extra=draw(st.sampled_from([0.0, 0.01])))
    return Item((life,), Payments("continuous", 1, term, draw(years), guarantee,
                                  draw(st.sampled_from([0.0, 0.03, -0.02]))))


@settings(max_examples=60, deadline=None)
@given(st.lists(_item(), min_size=1, max_size=8), st.sampled_from(ASSUMPTIONS),
       st.sampled_from([0.0, 0.04, -0.01, 1e-12]))
def test_drawn_items_agree_with_the_general_path(items, assumption, rate):
    # The Standard Select Survival Model (select ages 20 to 118): durations 0 to 3 at ages
    # 20 to 110 are all valid selections.
    tables, valuation = [models.susm_select()], Valuation(rate, assumption)
    items = _valid(tables, items, valuation)
    if items:
        _assert_same(tables, items, valuation)


@pytest.mark.parametrize("assumption", ASSUMPTIONS)
@pytest.mark.parametrize("rate", [0.045, 0.0, -0.03])
def test_edges_agree(assumption, rate):
    table = models.susm_short()  # closes at 105
    last = float(table.last_age)
    items = [
        Item((Life(last),), Payments("continuous")),  # at the last age
        Item((Life(last - 0.25),), Payments("continuous")),  # within a year of it
        Item((Life(103.0, mortality_multiplier=50.0),), Payments("continuous")),  # q = 1 early
        Item((Life(90.0),), Payments("continuous", guarantee=30.0)),  # guarantee past the end
        Item((Life(90.4),), Payments("continuous", term=30.0, guarantee=17.3)),
        Item((Life(60.25),), Payments("continuous", term=1e-6)),  # a moment
        Item((Life(60.0),), Payments("continuous", deferral=50.0)),  # deferred past the end
        Item((Life(60.7),), Payments("continuous", deferral=44.6, guarantee=3.0)),
        Item((Life(100.0, flat_extra=1.0),), Payments("continuous")),  # dies within the year
        Item((Life(64.3),), Payments("continuous", term=10.0, deferral=0.7,
                                     escalation=0.04)),  # window years on whole ages
        Item((Life(64.3),), Payments("continuous", term=10.0, deferral=0.7 - 1e-13,
                                     escalation=0.04)),  # just before them
    ]
    _assert_same([table], items, Valuation(rate, assumption))


def _annual_due(q, first_age, age, v, n=None):
    """ä_x (n years where given) for an integer age, summed from the definition in plain
    Python: sum_k v^k k_p_x, k_p_x the product of (1 - q) over the years before."""
    out, alive, k = 0.0, 1.0, 0
    for qk in q[age - first_age:]:
        if n is not None and k >= n:
            break
        out += v**k * alive
        alive *= 1.0 - qk
        k += 1
    return out, alive if n is not None and k >= n else 0.0


def _alpha_beta(delta):
    """alpha(inf) = i d / delta^2 and beta(inf) = (i - delta) / delta^2, written for small
    delta too: i d = 4 sinh^2(delta/2), (e^delta - 1 - delta) / delta^2 = sum delta^k/(k+2)!."""
    if delta == 0.0:
        return 1.0, 0.5
    alpha = (2.0 * math.sinh(delta / 2) / delta) ** 2
    if abs(delta) < 0.1:
        beta = sum(delta**k / math.factorial(k + 2) for k in range(20))
    else:
        beta = (math.expm1(delta) - delta) / delta**2
    return alpha, beta


@pytest.mark.parametrize("rate", [0.04, 0.0, 1e-12, 1e-6, -0.02, 0.3])
@pytest.mark.parametrize("age", [20, 45, 65, 88, 119])
def test_udd_relation_to_the_annual_annuity_due(rate, age):
    # Under UDD, a-bar_x = alpha(inf) a-due_x - beta(inf) and, for n whole years,
    # a-bar_x:n = alpha(inf) a-due_x:n - beta(inf) (1 - v^n n_p_x), with alpha(inf) = i d /
    # delta^2 and beta(inf) = (i - delta) / delta^2 (Dickson, Hardy and Waters, Actuarial
    # Mathematics for Life Contingent Risks, chapter 5, the m-thly annuities under UDD as m
    # tends to infinity; recalled from memory). a-due is summed here from the table's rates.
    table = models.susm()
    delta = math.log1p(rate)
    v = 1.0 / (1.0 + rate)
    alpha, beta = _alpha_beta(delta)
    due, _ = _annual_due(table.q, table.first_age, age, v)
    due_n, alive_n = _annual_due(table.q, table.first_age, age, v, n=10)
    want = [alpha * due - beta, alpha * due_n - beta * (1.0 - v**10 * alive_n)]
    cols = {"age": [float(age)] * 2, "timing": ["continuous"] * 2, "term": [math.inf, 10.0]}
    got = value_columns([table], cols, Valuation(rate))
    np.testing.assert_allclose(got.value, want, rtol=1e-13, atol=0)
    assert got.method_code.tolist() == [INTEGRAL, INTEGRAL]


def _constant_q_table(q, first_age=20, last_age=200):
    return MortalityTable.of(first_age, [q] * (last_age - first_age) + [1.0])


def _integral(kappa, a, b):
    """int_a^b e^(-kappa t) dt in plain Python (the limit b - a where kappa is 0)."""
    if kappa == 0.0:
        return b - a
    return math.exp(-kappa * a) * -math.expm1(-kappa * (b - a)) / kappa


@pytest.mark.parametrize("rate", [0.04, 0.0, 1e-12, -0.02])
@pytest.mark.parametrize("age", [30.0, 61.37, 75.999999999999, 120.5])
def test_constant_force_of_mortality_closed_form(rate, age):
    # With q constant below the closing age L and a constant force within each year, the
    # force is mu = -ln(1 - q) at every age: t_p_x = e^(-mu t) up to L, where the table
    # closes. So a-bar_x = (1 - e^(-(mu + delta)(L - x))) / (mu + delta), the truncation of
    # a-bar = 1 / (mu + delta) (Dickson, Hardy and Waters, Actuarial Mathematics for Life
    # Contingent Risks, chapter 5, constant force of mortality; recalled from memory).
    # Deferred u, guaranteed g and escalating at r from the window's anniversaries, each
    # window year k is (1 + r)^k times the integral of e^(-kappa t) over it, kappa = delta +
    # mu for the life-contingent part and delta (times u_p_x = e^(-mu u)) for the certain one.
    q, last = 0.02, 200
    mu = -math.log1p(-q)
    delta = math.log1p(rate)
    table = _constant_q_table(q, last_age=last)
    end = last - age
    shapes = [(None, 0.0, 0.0, 0.0), (25.0, 0.0, 0.0, 0.0), (None, 3.7, 0.0, 0.0),
              (30.5, 2.25, 6.6, 0.03), (None, 0.4, 10.0, -0.01), (12.0, 0.0, 12.0, 0.05)]
    want = []
    for term, u, g, r in shapes:
        stop = min(u + (math.inf if term is None else term), max(u + g, end))
        total, k = 0.0, 0
        while u + k < stop:
            lo, hi = u + k, min(u + k + 1, stop)
            sure = _integral(delta, lo, min(hi, u + g)) * math.exp(-mu * u) if lo < u + g else 0
            life = _integral(delta + mu, max(lo, u + g), min(hi, end)) if hi > u + g else 0
            total += (1.0 + r) ** k * (sure + max(life, 0.0))
            k += 1
        want.append(total)
    cols = {"age": [age] * len(shapes), "timing": ["continuous"] * len(shapes),
            "term": [math.inf if s[0] is None else s[0] for s in shapes],
            "deferral": [s[1] for s in shapes], "guarantee": [s[2] for s in shapes],
            "escalation": [s[3] for s in shapes]}
    got = value_columns([table], cols, Valuation(rate, "constant-force"))
    np.testing.assert_allclose(got.value, want, rtol=1e-12, atol=0)
    if age == 30.0 and rate == 0.04:  # the whole life, against the plain formula
        kappa = delta + mu
        assert got.value[0] == pytest.approx(-math.expm1(-kappa * end) / kappa, rel=1e-13)


def test_a_term_annuity_without_deaths_is_the_annuity_certain():
    # With a multiplier of 0 nobody dies before the table's last age: a 20.5-year term paid
    # continuously at 4%, escalating 3% at each anniversary of the window, deferred 1.2
    # years, is v^1.2 sum_k 1.03^k v^k a-bar_1 + 1.03^20 v^20 a-bar_0.5 with
    # a-bar_n = (1 - v^n) / delta (the annuity-certain, common practice), in plain Python.
    v, delta = 1 / 1.04, math.log(1.04)
    expected = v**1.2 * (sum(1.03**k * v**k for k in range(20)) * (1 - v) / delta
                         + 1.03**20 * v**20 * (1 - v**0.5) / delta)
    cols = Columns.from_dict({"age": [50.4], "mortality_multiplier": [0.0],
                              "timing": ["continuous"], "term": [20.5], "deferral": [1.2],
                              "escalation": [0.03]})
    for assumption in ASSUMPTIONS:
        got = value_columns([models.susm()], cols, Valuation(0.04, assumption))
        assert got.value[0] == pytest.approx(expected, rel=1e-13)
        assert got.method_code.tolist() == [INTEGRAL]


def test_the_guarantee_given_alive_at_the_deferral():
    # Deferred 5 years, then 10 years certain, paid continuously: 5_p_x v^5 a-bar_10, with
    # q = 0.1 every year (a multiplier of 0 and a flat extra of 0.1) so 5_p_x = 0.9^5 for an
    # integer age (hand-worked), and a-bar_10 = (1 - v^10) / delta (common practice).
    v, delta = 1 / 1.05, math.log(1.05)
    expected = 0.9**5 * v**5 * (1 - v**10) / delta
    cols = {"age": [60.0], "mortality_multiplier": [0.0], "flat_extra": [0.1],
            "timing": ["continuous"], "deferral": [5.0], "guarantee": [10.0], "term": [10.0]}
    for assumption in ASSUMPTIONS:
        got = value_columns([models.susm()], cols, Valuation(0.05, assumption))
        assert got.value[0] == pytest.approx(expected, rel=1e-13)


def test_the_frequency_of_a_continuous_item_is_ignored():
    # As by the general path: any frequency, and periods that are not whole ones.
    tables = [models.susm()]
    items = [Item((Life(61.3),), Payments("continuous", m, term=10.05, deferral=0.33,
                                          guarantee=2.01)) for m in (1, 12, 400, 0)]
    valuation = Valuation(0.04)
    got = _assert_same(tables, items, valuation)
    assert len(set(got.value.tolist())) == 1
    cols = Columns.from_dict({"age": [61.3] * 2, "timing": ["continuous"] * 2,
                              "frequency": [np.nan, 2.5], "term": [10.05] * 2,
                              "deferral": [0.33] * 2, "guarantee": [2.01] * 2})
    assert problems(tables, cols, "udd") == {}
    np.testing.assert_array_equal(value_columns(tables, cols, valuation).value,
                                  got.value[:2])


def test_columns_hold_continuous_timings_by_name_and_code():
    cols = Columns.from_dict({"age": [60.0, 61.0, 62.0, 63.0],
                              "timing": ["continuous", "advance", "weekly", "arrears"]})
    assert cols.timing.tolist() == [2, 0, -1, 1]
    coded = Columns.from_dict({"age": [60.0, 61.0, 62.0], "timing": [2, 3, 0]})
    assert coded.timing.tolist() == [2, -1, 0]
    item = Item((Life(60.0),), Payments("continuous", 12, term=5.5, deferral=0.2))
    assert Columns.from_items([item]).to_items() == [item]


#: Continuous items the general path refuses, each with what makes it impossible.
BAD = [
    Item((Life(60.0),), Payments("continuous", term=0.0)),
    Item((Life(60.0),), Payments("continuous", term=-2.0)),
    Item((Life(60.0),), Payments("continuous", term=math.nan)),
    Item((Life(60.0),), Payments("continuous", deferral=-1.0)),
    Item((Life(60.0),), Payments("continuous", deferral=math.inf)),
    Item((Life(60.0),), Payments("continuous", guarantee=-0.5)),
    Item((Life(60.0),), Payments("continuous", term=5.0, guarantee=6.0)),
    Item((Life(60.0),), Payments("continuous", escalation=-1.5)),
    Item((Life(10.0),), Payments("continuous")),  # below the table
    Item((Life(131.0),), Payments("continuous")),  # above it
    Item((Life(60.0, mortality_multiplier=-1.0),), Payments("continuous")),
    Item((Life(60.0, flat_extra=1.5),), Payments("continuous")),
    Item((Life(20.0, duration=1),), Payments("continuous")),  # selected at 19
    Item((Life(60.0, table=3),), Payments("continuous")),
    Item((Life(60.0, age_adjustment=math.nan),), Payments("continuous")),
    Item((Life(60.0, duration=-1),), Payments("continuous")),
]


@pytest.mark.parametrize("assumption", ASSUMPTIONS)
def test_the_same_errors_as_the_general_path(assumption):
    tables = [models.susm_select()]
    valuation = Valuation(0.05, assumption)
    good = Item((Life(65.5),), Payments("continuous", term=12.5))
    for bad in BAD:
        batch = [good, Item((Life(60.0), Life(61.0)), Payments("continuous")), bad,
                 Item((Life(61.0),), Payments("advance", 12)), good]
        got = []
        for fast in (True, False):
            with pytest.raises(ItemError) as caught:
                value_annuities(tables, batch, valuation, fast=fast)
            got.append(caught.value.errors)
        assert got[0] == got[1]
        single = [item for item in batch if len(item.lives) == 1]
        with pytest.raises(ItemError) as general:
            value_annuities(tables, single, valuation, fast=False)
        cols = Columns.from_items(single)
        assert problems(tables, cols, assumption) == general.value.errors
        with pytest.raises(ItemError) as caught:
            value_columns(tables, cols, valuation)
        assert caught.value.errors == general.value.errors
    with pytest.raises(ItemError) as fast:
        value_annuities(tables, BAD + [good], valuation)
    with pytest.raises(ItemError) as general:
        value_annuities(tables, BAD + [good], valuation, fast=False)
    assert fast.value.errors == general.value.errors


def test_mixed_batches_keep_order_codes_and_methods():
    tables = [models.susm()]
    items = [Item((Life(60.0),), Payments("advance", 12)),
             Item((Life(60.0), Life(55.0)), Payments("continuous"), (1, 1, 0.5)),
             Item((Life(70.25),), Payments("continuous", deferral=1.5, guarantee=5.0)),
             Item((Life(65.0),), Payments("arrears", 4, term=10.0)),
             Item((Life(66.6),), Payments("continuous", 4, term=3.3, escalation=0.1))]
    for approximation in ("exact", "woolhouse-2"):
        got = _assert_same(tables, items, Valuation(0.04, approximation=approximation))
        assert got.method_code[[2, 4]].tolist() == [INTEGRAL, INTEGRAL]
    cols = Columns.from_items([items[n] for n in (0, 2, 3, 4)])
    got = value_columns(tables, cols, Valuation(0.04, approximation="woolhouse-3"))
    want = value_annuities(tables, cols.to_items(), Valuation(0.04, approximation="woolhouse-3"),
                           fast=False)
    assert got.method_code.tolist() == want.method_code.tolist()
    assert got.method_code[0] != EXACT_SUM and got.method_code[1] == INTEGRAL
    np.testing.assert_allclose(got.value, want.value, rtol=RTOL, atol=0)


@pytest.mark.parametrize("approximation", ["exact", "woolhouse-2"])
def test_a_batch_held_partly_as_columns_values_as_its_items(bases, approximation):
    basis = next(b for b in bases if b.id == "standard-ultimate")
    tables = basis.tables
    items = _random_items(np.random.default_rng(12), tables, 40)
    items[3] = Item((Life(age=60.0), Life(age=58.0)), Payments(frequency=12))
    items[9] = Item((Life(age=66.0),), Payments(frequency=4))
    items[21] = Item((Life(age=66.0),), Payments("continuous"), start_requires="first")
    valuation = Valuation(0.035, basis.fractional_age, approximation)
    items = _valid(tables, items, valuation)
    held = [n for n, item in enumerate(items) if n % 3 and len(item.lives) == 1
            and item.start_requires == "any"]
    batch = ItemBatch(len(items), np.array(held), Columns.from_items([items[n] for n in held]),
                      {n: items[n] for n in range(len(items)) if n not in held})
    assert list(batch) == items
    got = value_annuities(tables, batch, valuation)
    want = value_annuities(tables, items, valuation)
    assert got.value.tolist() == want.value.tolist()
    assert got.method_code.tolist() == want.method_code.tolist()
    general = value_annuities(tables, items, valuation, fast=False)
    np.testing.assert_allclose(got.value, general.value, rtol=RTOL, atol=0)


@pytest.mark.parametrize("assumption", ASSUMPTIONS)
def test_work_limit_and_deadline_are_honoured(assumption):
    tables = [models.susm()]
    single = [Item((Life(40.0 + n),), Payments("continuous", deferral=0.5 * n))
              for n in range(10)]
    valuation = Valuation(0.04, assumption)
    with pytest.raises(WorkLimitError) as general:
        value_annuities(tables, single, valuation, max_work=0, fast=False)
    # Under UDD one unit an item; otherwise what the general path prices for its segments.
    expected = 10 if assumption == "udd" else general.value.work
    value_annuities(tables, single, valuation, max_work=expected)
    with pytest.raises(WorkLimitError) as caught:
        value_annuities(tables, single, valuation, max_work=expected - 1)
    assert (caught.value.work, caught.value.limit) == (expected, expected - 1)
    with pytest.raises(WorkLimitError):
        value_columns(tables, Columns.from_items(single), valuation, max_work=expected - 1)
    with pytest.raises(DeadlineError):
        value_annuities(tables, single, valuation, deadline=time.monotonic() - 1)
    with pytest.raises(DeadlineError):
        value_columns(tables, Columns.from_items(single), valuation,
                      deadline=time.monotonic() - 1)


def test_a_curve_leaves_continuous_items_to_the_general_path():
    from service.engine.curves import Curve

    tables = [models.susm()]
    curve = Curve.from_mapping({"kind": "segments", "edges": [5], "rates": [0.03, 0.04]})
    cols = Columns.from_dict({"age": [60.0, 61.5], "timing": ["continuous", "advance"]})
    got = value_columns(tables, cols, Valuation(curve))
    want = value_annuities(tables, cols.to_items(), Valuation(curve), fast=False)
    assert got.method_code.tolist() == want.method_code.tolist() == [INTEGRAL, EXACT_SUM]
    np.testing.assert_allclose(got.value, want.value, rtol=RTOL, atol=0)


@pytest.mark.parametrize("size", [1, 2, 5, 8, 9])
def test_small_batches_with_continuous_items(size):
    # Small UDD batches of discrete items are valued in plain floats (service.engine.small);
    # a continuous item among them must still be valued as continuous.
    tables = [models.susm()]
    rng = np.random.default_rng(size)
    items = []
    for n in range(size):
        timing = "continuous" if n % 2 == 0 else str(rng.choice(["advance", "arrears"]))
        items.append(Item((Life(float(rng.uniform(40, 95))),),
                          Payments(timing, 12, term=float(rng.integers(1, 30)),
                                   deferral=float(rng.integers(0, 5)), escalation=0.01)))
    got = _assert_same(tables, items, Valuation(0.04))
    assert got.method_code.tolist() == [INTEGRAL if n % 2 == 0 else EXACT_SUM
                                        for n in range(size)]
