"""The two-life fast path (service.engine.joint_columns) against the general path and closed
forms.

The general path (``value_annuities(..., fast=False)``) sums every payment date: amount x
v^t x (ab P(both) + a1 P(first only) + a2 P(second only)); its own tests check it against
direct references. Here the fast path, which values two-life discrete items on shared
chains (annual payments under UDD from cumulative columns, the others payment by payment),
must agree with it to 1e-12 relative on every shipped basis, every fractional-age
assumption and every option, keep the method codes and the places of a mixed batch, raise
the same errors and honour the same limits. Independent checks: the survivorship identities
between statuses, and geometric closed forms for lives with a constant q.
"""

import math
import time

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.bases.registry import load_registry
from service.engine import joint_columns
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
from service.engine.errors import DeadlineError, ItemError, WorkLimitError
from service.engine.tables import MortalityTable
from tests.engine.paths import assert_same as _assert_same
from tests.engine.paths import errors_both_ways
from tests.engine.paths import valid as _valid
from tests.reference import models

ASSUMPTIONS = ("udd", "constant-force", "balducci")
FREQUENCIES = (1, 1, 1, 2, 4, 12)
RTOL = 1e-12
JOINT = (1.0, 0.0, 0.0)
LAST_SURVIVOR = (1.0, 1.0, 1.0)
REVERSIONARY = (0.0, 0.0, 1.0)
SHAPES = (JOINT, LAST_SURVIVOR, REVERSIONARY, (1.0, 0.5, 0.5), (1.0, 2 / 3, 2 / 3),
          (0.0, 1.0, 0.0), (0.6, 1.0, 0.3))
REQUIREMENTS = ("any", "first", "both")


@pytest.fixture(scope="module")
def bases():
    return [b for b in load_registry("tables").listing() if b.interest.kind == "flat"]


def _rate(basis):
    return basis.interest.rates[0]


def _random_life(rng, tables, m):
    """A life with every option: fractional ages (some on a payment date of the year, some
    within 1e-10 of a whole age, some at the table's last age), select durations,
    multipliers and flat extras."""
    ti = int(rng.integers(0, len(tables)))
    table = tables[ti]
    age = float(rng.uniform(table.first_age, table.last_age))
    draw = rng.random()
    if draw < 0.2:
        age = min(math.floor(age) + int(rng.integers(0, m)) / m, float(table.last_age))
    elif draw < 0.3:
        age = math.floor(age) + float(rng.choice([-1e-10, 1e-10, 0.0]))
        age = min(max(age, float(table.first_age)), float(table.last_age))
    elif draw < 0.33:
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
    return Life(age, table=ti, duration=duration,
                age_adjustment=float(rng.choice([0.0, 0.0, -2.0, 1.5])),
                mortality_multiplier=float(rng.choice([1.0, 1.0, 0.0, 0.5, 1.5, 25.0])),
                flat_extra=float(rng.choice([0.0, 0.0, 0.002, 0.05])))


def _random_pairs(rng, tables, n, frequencies=FREQUENCIES):
    """Two-life discrete items with every option: each survivorship shape and start
    requirement, deferral, term, guarantee, escalation, m = 1, 2, 4, 12, both timings;
    partners of any age (some near each other, some far apart)."""
    items = []
    for _ in range(n):
        m = int(rng.choice(frequencies))
        first = _random_life(rng, tables, m)
        second = _random_life(rng, tables, m)
        if rng.random() < 0.5:  # a partner within 5 years, on the same table
            age = min(max(first.age + float(rng.uniform(-5, 5)), tables[first.table].first_age),
                      tables[first.table].last_age)
            second = Life(age, table=first.table)
        term = None if rng.random() < 0.4 else (int(rng.integers(0, 40))
                                                 + int(rng.integers(1, m + 1)) / m)
        guarantee = 0.0
        if rng.random() < 0.4:
            guarantee = int(rng.integers(0, 15 * m)) / m
            if term is not None:
                guarantee = min(guarantee, term)
        deferral = int(rng.integers(0, 12 * m)) / m if rng.random() < 0.3 else 0.0
        shape = SHAPES[int(rng.integers(0, len(SHAPES)))]
        items.append(Item((first, second),
                          Payments(str(rng.choice(["advance", "arrears"])), m, term, deferral,
                                   guarantee, float(rng.choice([0.0, 0.02, -0.01, 0.05]))),
                          shape, str(rng.choice(REQUIREMENTS))))
    return items


def _covered(tables, items, valuation):
    """The fast path itself values these items (it does not hand them back)."""
    return joint_columns.dispatch(tables, items, valuation, max_work=None,
                                  deadline=None) is not None


@pytest.mark.parametrize("assumption", ASSUMPTIONS)
def test_random_pairs_on_every_basis_agree_with_the_general_path(bases, assumption):
    rng = np.random.default_rng(31_000 + ASSUMPTIONS.index(assumption))
    for basis in bases:
        valuation = Valuation(_rate(basis), assumption, basis.approximation)
        items = _valid(basis.tables, _random_pairs(rng, basis.tables, 150), valuation)
        assert len(items) > 100
        assert _covered(basis.tables, items, valuation)
        _assert_same(basis.tables, items, valuation)


@pytest.mark.parametrize("rate", [0.0, 0.04, -0.01, 0.25])
def test_annual_pairs_under_udd_agree_with_the_general_path(bases, rate):
    # Annual payments under UDD are valued from cumulative columns: every option on it.
    rng = np.random.default_rng(31_100 + int(rate * 100))
    for basis in bases:
        valuation = Valuation(rate, "udd")
        items = _valid(basis.tables, _random_pairs(rng, basis.tables, 120, (1,)), valuation)
        assert len(items) > 80
        _assert_same(basis.tables, items, valuation)


@st.composite
def _pair(draw):
    m = draw(st.sampled_from((1, 2, 4, 12)))
    periods = st.integers(0, 30 * m)
    term = draw(st.none() | st.integers(1, 40 * m).map(lambda k: k / m))
    guarantee = draw(periods) / m
    if term is not None:
        guarantee = min(guarantee, term)
    lives = tuple(Life(draw(st.floats(20, 110)), duration=draw(st.none() | st.integers(0, 3)),
                       mortality_multiplier=draw(st.sampled_from([1.0, 0.0, 0.7, 3.0])),
                       flat_extra=draw(st.sampled_from([0.0, 0.01])))
                  for _ in range(2))
    return Item(lives, Payments(draw(st.sampled_from(["advance", "arrears"])), m, term,
                                draw(periods) / m, guarantee,
                                draw(st.sampled_from([0.0, 0.03, -0.02]))),
                draw(st.sampled_from(SHAPES)), draw(st.sampled_from(REQUIREMENTS)))


@settings(max_examples=60, deadline=None)
@given(st.lists(_pair(), min_size=1, max_size=8), st.sampled_from(ASSUMPTIONS),
       st.sampled_from([0.0, 0.04, -0.01]))
def test_drawn_pairs_agree_with_the_general_path(items, assumption, rate):
    # The Standard Select Survival Model (select ages 20 to 118): durations 0 to 3 at ages
    # 20 to 110 are all valid selections.
    tables, valuation = [models.susm_select()], Valuation(rate, assumption)
    items = _valid(tables, items, valuation)
    if items:
        _assert_same(tables, items, valuation)


@pytest.mark.parametrize("assumption", ASSUMPTIONS)
@pytest.mark.parametrize("m", (1, 2, 4, 12))
@pytest.mark.parametrize("timing", ["advance", "arrears"])
def test_edges_agree(assumption, m, timing):
    table = models.susm_short()  # closes at 105
    last = float(table.last_age)
    young = Life(60.0)
    items = [
        Item((Life(last), Life(last)), Payments(timing, m), LAST_SURVIVOR),  # both at the end
        Item((Life(last - 1 + (m - 1) / m), young), Payments(timing, m), REVERSIONARY),
        Item((Life(103.0, mortality_multiplier=50.0), young), Payments(timing, m)),  # q = 1
        Item((Life(90.0), Life(95.5)), Payments(timing, m, guarantee=30.0)),  # past the end
        Item((Life(60.25), Life(61.0)), Payments(timing, m, term=1 / m), JOINT),  # one payment
        Item((Life(60.0), Life(55.0)), Payments(timing, m, deferral=50.0), LAST_SURVIVOR,
             "both"),  # deferred past the end
        Item((Life(100.0, flat_extra=1.0), young), Payments(timing, m), (1.0, 0.5, 0.5),
             "first"),  # the first dies within the year
        Item((Life(30.0), Life(25.0)), Payments(timing, m, term=1.0), (1.0, 0.0, 1.0)),
    ]
    for rate in (0.045, 0.0, -0.02):
        _assert_same([table], items, Valuation(rate, assumption))


# -------------------------------------------------------------------------------------------
# Independent checks


@pytest.mark.parametrize("assumption", ASSUMPTIONS)
@pytest.mark.parametrize("payments", [Payments(), Payments("arrears"), Payments("advance", 12),
                                      Payments("arrears", 4, term=15.0, deferral=2.5,
                                               escalation=0.02)])
@pytest.mark.parametrize(("x", "y"), ((65.0, 62.0), (70.5, 81.25), (100.0, 30.0)))
def test_survivorship_identities(assumption, payments, x, y):
    # Without a guarantee or start requirement, P(first only) = p1 - p1 p2 and P(second
    # only) = p2 - p1 p2 (independent lives), so each shape is a combination of the single
    # lives' annuities and the joint-life one (common practice):
    # last survivor = a_x + a_y - a_xy; reversionary to the second = a_y - a_xy;
    # (1, 1/2, 1/2) = (a_x + a_y) / 2; (1, 2/3, 2/3) = 2/3 (a_x + a_y) - 1/3 a_xy.
    # a_x and a_y are single-life items (the column path); the others two-life items.
    tables = [models.susm()]
    one, two = Life(x), Life(y)
    items = [Item((one,), payments), Item((two,), payments),
             Item((one, two), payments, JOINT), Item((one, two), payments, LAST_SURVIVOR),
             Item((one, two), payments, REVERSIONARY), Item((one, two), payments, (1, .5, .5)),
             Item((one, two), payments, (1, 2 / 3, 2 / 3))]
    valuation = Valuation(0.04, assumption)
    assert _covered(tables, items, valuation)
    ax, ay, axy, last, rev, half, two_thirds = value_annuities(tables, items, valuation).value
    scale = ax + ay
    assert last == pytest.approx(ax + ay - axy, rel=1e-13, abs=1e-14 * scale)
    assert rev == pytest.approx(ay - axy, rel=1e-12, abs=1e-14 * scale)
    assert half == pytest.approx((ax + ay) / 2, rel=1e-13, abs=1e-14 * scale)
    assert two_thirds == pytest.approx(2 / 3 * (ax + ay) - axy / 3, rel=1e-13,
                                       abs=1e-14 * scale)


Q1, Q2 = 0.05, 0.08


def _constant_tables():
    """Two tables with a constant q from age 0 to 999 (q = 1 at 1000, the table's close):
    with p <= 0.95 and v <= 1, what lies beyond (p^900 < 1e-20) does not show."""
    return [MortalityTable.of(0, [Q1] * 1000 + [1.0]),
            MortalityTable.of(0, [Q2] * 1000 + [1.0])]


def _geometric(z, m=1, advance=True):
    """sum_(j >= 0) z^(j/m) / m (advance) or sum_(j >= 1) (arrears): (1/m) / (1 - z^(1/m))
    and its arrears counterpart z^(1/m) times it (geometric series, common practice)."""
    r = z ** (1 / m)
    return (1 / m) / (1 - r) * (1 if advance else r)


@pytest.mark.parametrize("assumption", ASSUMPTIONS)
@pytest.mark.parametrize("timing", ["advance", "arrears"])
@pytest.mark.parametrize("rate", [0.04, 0.0])
def test_whole_life_annual_with_constant_q_is_geometric(assumption, timing, rate):
    # Independent lives with constant q1, q2 at whole ages: k_p = p^k under any assumption
    # at whole times, the joint status survives with (p1 p2)^k, so the joint whole-life
    # annuity-due is sum v^k (p1 p2)^k = 1 / (1 - v p1 p2); at least one alive with
    # p1^k + p2^k - (p1 p2)^k (closed forms from the definition).
    tables = _constant_tables()
    v = 1 / (1 + rate)
    p1, p2 = 1 - Q1, 1 - Q2
    advance = timing == "advance"
    joint = _geometric(v * p1 * p2, advance=advance)
    last = _geometric(v * p1, advance=advance) + _geometric(v * p2, advance=advance) - joint
    pay = Payments(timing)
    items = [Item((Life(40.0, table=0), Life(47.0, table=1)), pay, JOINT),
             Item((Life(40.0, table=0), Life(47.0, table=1)), pay, LAST_SURVIVOR),
             Item((Life(52.0, table=1), Life(33.0, table=0)), pay, REVERSIONARY)]
    valuation = Valuation(rate, assumption)
    assert _covered(tables, items, valuation)
    got = value_annuities(tables, items, valuation).value
    assert got[0] == pytest.approx(joint, rel=1e-13)
    assert got[1] == pytest.approx(last, rel=1e-13)
    # Reversionary to the second (q1): paid while the second lives and the first does not.
    rev = _geometric(v * p1, advance=advance) - _geometric(v * p1 * p2, advance=advance)
    assert got[2] == pytest.approx(rev, rel=1e-12)


@pytest.mark.parametrize("m", (1, 2, 4, 12))
@pytest.mark.parametrize("timing", ["advance", "arrears"])
def test_constant_force_with_constant_q_is_geometric_at_any_age_and_frequency(m, timing):
    # Under a constant force within each year and a constant q, t_p = p^t at any t from any
    # age, so the joint m-thly annuity is (1/m) sum_j (v p1 p2)^(j/m) (closed form from the
    # definition), here at fractional ages.
    tables = _constant_tables()
    v = 1 / 1.035
    p1, p2 = 1 - Q1, 1 - Q2
    advance = timing == "advance"
    pay = Payments(timing, m)
    items = [Item((Life(40.3, table=0), Life(47.85, table=1)), pay, JOINT),
             Item((Life(40.3, table=0), Life(47.85, table=1)), pay, LAST_SURVIVOR)]
    got = value_annuities(tables, items, Valuation(0.035, "constant-force")).value
    joint = _geometric(v * p1 * p2, m, advance)
    assert got[0] == pytest.approx(joint, rel=1e-12)
    assert got[1] == pytest.approx(_geometric(v * p1, m, advance)
                                   + _geometric(v * p2, m, advance) - joint, rel=1e-12)


@pytest.mark.parametrize("assumption", ASSUMPTIONS)
def test_deferred_last_survivor_requiring_both_is_geometric(assumption):
    # Deferred u = 6 years, payments start only if both are alive then: each payment at
    # k >= u is made with probability (p1 p2)^u (p1^(k-u) + p2^(k-u) - (p1 p2)^(k-u)), so
    # the value is v^u (p1 p2)^u times the last-survivor annuity-due of the constant-q
    # lives (closed form from the definition, whole ages and times).
    tables = _constant_tables()
    v = 1 / 1.05
    p1, p2 = 1 - Q1, 1 - Q2
    u = 6
    item = Item((Life(50.0, table=0), Life(45.0, table=1)), Payments(deferral=float(u)),
                LAST_SURVIVOR, "both")
    expected = (v * p1 * p2) ** u * (_geometric(v * p1) + _geometric(v * p2)
                                     - _geometric(v * p1 * p2))
    got = value_annuities(tables, [item], Valuation(0.05, assumption)).value[0]
    assert got == pytest.approx(expected, rel=1e-13)


# -------------------------------------------------------------------------------------------
# Batches, errors and limits


#: One and two lives, discrete and continuous, every survivorship shape (used by the tests
#: of JointColumns too).
MIXED = [Item((Life(60.0),), Payments("advance", 12)),
         Item((Life(60.0), Life(55.0)), Payments("advance", 12), (1, 1, 0.5)),
         Item((Life(70.25),), Payments("continuous")),
         Item((Life(66.0), Life(64.5)), Payments("continuous"), JOINT),
         Item((Life(65.0),), Payments("arrears", 4, term=10.0)),
         Item((Life(71.5), Life(69.0)), Payments(), LAST_SURVIVOR, "first"),
         Item((Life(80.0),), Payments(guarantee=5.0)),
         Item((Life(58.0), Life(61.0)), Payments("arrears", 1, guarantee=10.0), REVERSIONARY)]


def test_mixed_batches_keep_places_codes_and_methods():
    tables = [models.susm()]
    items = MIXED
    for approximation in ("exact", "woolhouse-2", "woolhouse-3"):
        valuation = Valuation(0.04, approximation=approximation)
        got = _assert_same(tables, items, valuation)
        assert got.method_code[2] == got.method_code[3] == INTEGRAL
        if approximation != "exact":  # m > 1 under Woolhouse: the general path's
            assert got.method_code[1] == WOOLHOUSE_SUM
        assert got.method_code[5] == got.method_code[7] == EXACT_SUM
        # Each item alone gives its own value: the places are kept.
        for n, item in enumerate(items):
            alone = value_annuities(tables, [item], valuation, fast=False)
            assert got.value[n] == pytest.approx(alone.value[0], rel=RTOL)


def test_a_batch_of_pairs_only_and_of_single_lives_around_pairs(bases):
    basis = next(b for b in bases if b.id == "fernhollow-annuitants" and
                 b.approximation == "exact")
    rng = np.random.default_rng(31_200)
    pairs = _random_pairs(rng, basis.tables, 40)
    singles = [Item((_random_life(rng, basis.tables, 1),), Payments("advance", 4, term=20.0))
               for _ in range(40)]
    mixed = [item for pair in zip(singles, pairs, strict=True) for item in pair]
    valuation = Valuation(_rate(basis), "udd")
    mixed = _valid(basis.tables, mixed, valuation)
    got = _assert_same(basis.tables, mixed, valuation)
    only = [item for item in mixed if len(item.lives) == 2]
    alone = value_annuities(basis.tables, only, valuation).value
    np.testing.assert_array_equal(got.value[[len(i.lives) == 2 for i in mixed]], alone)


BAD = [
    Item((Life(60.0), Life(150.0)), Payments()),  # second life past the table's ages
    Item((Life(60.0), Life(10.0)), Payments()),  # before them
    Item((Life(60.0), Life(61.0, mortality_multiplier=-1.0)), Payments()),
    Item((Life(60.0), Life(61.0, flat_extra=1.5)), Payments()),
    Item((Life(60.0), Life(61.0, duration=-1)), Payments()),
    Item((Life(60.0), Life(61.0, duration=1.5)), Payments()),
    Item((Life(60.0), Life(61.0, table=3)), Payments()),  # no such table
    Item((Life(60.0), Life(19.0, duration=1)), Payments()),  # selected before the table
    Item((Life(60.0), Life(60.5, flat_extra=1.0)), Payments()),  # dead at its age
    Item((Life(60.0), Life(61.0, age_adjustment=math.nan)), Payments()),
    Item((Life(60.0), Life(61.0)), Payments(), (1.0, 1.5, 0.0)),
    Item((Life(60.0), Life(61.0)), Payments(), (1.0, math.nan, 0.0)),
    Item((Life(60.0), Life(61.0)), Payments(), LAST_SURVIVOR, "second"),
    Item((Life(60.0), Life(61.0), Life(62.0)), Payments()),
    Item((Life(60.0), Life(61.0)), Payments("advance", 12, term=10.01)),
    Item((Life(60.0), Life(61.0)), Payments("advance", 2.0)),
    Item((Life(60.0), Life(61.0)), Payments("weekly", 1)),
    Item((Life(60.0), Life(61.0)), Payments(guarantee=12.0, term=10.0)),
    Item((Life(60.0), Life(61.0)), Payments(escalation=-1.0)),
]


@pytest.mark.parametrize("assumption", ASSUMPTIONS)
def test_the_same_errors_as_the_general_path(assumption):
    tables = [models.susm_select()]
    valuation = Valuation(0.05, assumption)
    good = Item((Life(65.5), Life(63.0)), Payments("advance", 12))
    single = Item((Life(70.0),), Payments())
    # Each bad item alone among good ones, in the middle of a batch.
    refused = 0
    for bad in BAD:
        for batch in ([good, single, bad, good], [good, bad], [bad]):
            got = errors_both_ways(tables, batch, valuation)
            assert got[0] == got[1]
            refused += got[1] is not None
    # (under UDD a life half a year past its integer age with q = 1 is alive: 1 - 0.5 q)
    assert refused == 3 * (len(BAD) - (assumption == "udd"))
    # All at once, with single lives among them.
    got = []
    for fast in (True, False):
        with pytest.raises(ItemError) as caught:
            value_annuities(tables, [single, *BAD, good], valuation, fast=fast)
        got.append(caught.value.errors)
    assert got[0] == got[1]


def test_a_second_life_dead_at_its_age_is_refused_as_by_the_general_path():
    # A flat extra of 1 under a constant force: a life past its integer age is dead.
    tables = [models.susm()]
    items = [Item((Life(60.0), Life(60.5, flat_extra=1.0)), Payments())]
    valuation = Valuation(0.05, "constant-force")
    with pytest.raises(ItemError) as fast:
        value_annuities(tables, items, valuation)
    with pytest.raises(ItemError) as general:
        value_annuities(tables, items, valuation, fast=False)
    assert fast.value.errors == general.value.errors == {"0.lives.1.age": [
        "the life cannot be alive at this age under the adjusted table (survival from its "
        "integer age is 0)"]}


def test_work_limit_and_deadline_are_honoured():
    tables = [models.susm()]
    couples = [Item((Life(40.0), Life(42.0)), Payments("advance", 12, guarantee=5.0))] * 3
    single = [Item((Life(40.0),), Payments())] * 2
    valuation = Valuation(0.04)
    # The general path's units: its payment dates, one per year of a guarantee.
    with pytest.raises(WorkLimitError) as general:
        value_annuities(tables, couples, valuation, max_work=1, fast=False)
    work = general.value.work
    value_annuities(tables, couples, valuation, max_work=work)
    with pytest.raises(WorkLimitError) as caught:
        value_annuities(tables, couples, valuation, max_work=work - 1)
    assert (caught.value.work, caught.value.limit) == (work, work - 1)
    # With single lives on the column path (one unit each under UDD).
    with pytest.raises(WorkLimitError) as both:
        value_annuities(tables, single + couples, valuation, max_work=work)
    assert both.value.work == work + 2
    with pytest.raises(DeadlineError):
        value_annuities(tables, couples, valuation, deadline=time.monotonic() - 1)


def test_cancelling_windows_are_summed_payment_by_payment():
    # A one-year term at young ages with a negative rate: the suffix sums of the columns
    # are many times the window's value, so the payments are summed instead; the values
    # still agree with the general path, and with the definition: 1 for the payment at 0
    # in advance; in arrears v p (two lives: v (p1 + p2 - p1 p2) for the last survivor).
    tables = [models.susm()]
    items = [Item((Life(20.0), Life(21.0)), Payments(term=1.0), LAST_SURVIVOR),
             Item((Life(20.0), Life(21.0)), Payments("arrears", term=1.0), LAST_SURVIVOR),
             Item((Life(20.0), Life(21.0)), Payments("arrears", term=2.0, deferral=1.0),
                  JOINT)]
    valuation = Valuation(-0.03, "udd")
    got = _assert_same(tables, items, valuation)
    assert got.value[0] == 1.0
    q = models.susm()
    p1 = 1 - q.q[20 - q.first_age]
    p2 = 1 - q.q[21 - q.first_age]
    assert got.value[1] == pytest.approx((p1 + p2 - p1 * p2) / 0.97, rel=1e-14)
