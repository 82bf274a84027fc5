"""Small batches (service.engine.small, at most SMALL_BATCH items) against the general path
and the column path.

The general path (``value_annuities(..., fast=False)``) sums every payment date, amount x
v^t x t_p_x; its own tests check it against direct references. A batch of a few items is
valued in plain floats; the same items in a large batch go through the column path's arrays.
All three must agree to 1e-12 relative and refuse the same items with the same errors.
"""

import math

import numpy as np
import pytest
from mpmath import mp, mpf

from service.bases.registry import load_registry
from service.engine import small
from service.engine.annuity import EXACT_SUM, Item, Life, Payments, Valuation, value_annuities
from service.engine.columns import Columns, value_columns
from service.engine.errors import DeadlineError, WorkLimitError
from service.engine.tables import MortalityTable
from tests.engine.paths import errors_both_ways
from tests.engine.paths import valid as _valid
from tests.engine.test_columns import BAD, _random_items
from tests.reference import models

RTOL = 1e-12


@pytest.fixture(scope="module")
def bases():
    return load_registry("tables").listing()


@pytest.mark.parametrize("rate", [0.04, 0.0, -0.01, 1e-7])
def test_each_item_alone_agrees_with_the_batch_and_the_general_path(bases, rate):
    rng = np.random.default_rng(4100 + int(rate * 1e4))
    for basis in bases:
        valuation = Valuation(rate)
        items = _valid(basis.tables, _random_items(rng, basis.tables, 60), valuation)
        assert len(items) > small.SMALL_BATCH
        general = value_annuities(basis.tables, items, valuation, fast=False).value
        batch = value_annuities(basis.tables, items, valuation).value  # column path
        alone = [value_annuities(basis.tables, [item], valuation) for item in items]
        np.testing.assert_allclose([a.value[0] for a in alone], general, rtol=RTOL, atol=0)
        np.testing.assert_allclose(batch, general, rtol=RTOL, atol=0)
        assert all(a.method_code.tolist() == [EXACT_SUM] for a in alone)
        # And in groups of SMALL_BATCH, as columns.
        for start in range(0, len(items), small.SMALL_BATCH):
            part = items[start:start + small.SMALL_BATCH]
            got = value_columns(basis.tables, Columns.from_items(part), valuation)
            np.testing.assert_allclose(got.value, general[start:start + len(part)],
                                       rtol=RTOL, atol=0)


def test_a_temporary_annuity_due_by_hand():
    # q = 0.1 at every age (multiplier 0, flat extra 0.1) at an integer age: a 10-year
    # annual annuity-due at 5% is sum_k (0.9 v)^k, k < 10 (the definition, summed here).
    v = 1 / 1.05
    expected = sum((0.9 * v) ** k for k in range(10))
    item = Item((Life(60.0, mortality_multiplier=0.0, flat_extra=0.1),),
                Payments("advance", 1, 10.0))
    got = value_annuities([models.susm()], [item], Valuation(0.05))
    assert got.value[0] == pytest.approx(expected, rel=1e-14)


def test_monthly_in_arrears_at_a_fractional_age_by_hand():
    # Constant q = 0.1 and UDD: from age 60.25, S(60.25 + t) / S(60.25) with
    # S(60 + k + s) = 0.9^k (1 - 0.1 s) (UDD, common practice); 24 monthly payments in
    # arrears of 1/12, each discounted at 4%, summed here payment by payment.
    v = 1 / 1.04

    def surv(y):
        k = math.floor(y + 1e-12)
        return 0.9**k * (1 - 0.1 * (y - k))

    expected = sum(v ** (j / 12) * surv(0.25 + j / 12) / surv(0.25) / 12 for j in range(1, 25))
    item = Item((Life(60.25, mortality_multiplier=0.0, flat_extra=0.1),),
                Payments("arrears", 12, 2.0))
    got = value_annuities([models.susm()], [item], Valuation(0.04))
    assert got.value[0] == pytest.approx(expected, rel=1e-13)


def test_small_batches_refuse_what_the_general_path_refuses():
    tables = [models.susm_select()]
    valuation = Valuation(0.05)
    good = Item((Life(65.5),), Payments("advance", 12))
    for bad in BAD:
        got = errors_both_ways(tables, [good, bad], valuation)
        assert got[0] == got[1]
    # A life dead at its age (a flat extra of 1 kills it within its first year under UDD:
    # alive at 60.5 with probability 0.5, so accepted; at 61 exactly it is fine too).
    dead = Item((Life(60.999999, flat_extra=1.0),), Payments())
    got = [value_annuities([models.susm()], [dead], valuation, fast=fast).value[0]
           for fast in (True, False)]
    assert got[0] == pytest.approx(got[1], rel=1e-12)


def test_limits_and_deadline():
    tables = [models.susm()]
    items = [Item((Life(40.0 + k),), Payments()) for k in range(5)]
    with pytest.raises(WorkLimitError) as caught:
        value_annuities(tables, items, Valuation(0.04), max_work=4)
    assert (caught.value.work, caught.value.limit) == (5, 4)
    with pytest.raises(DeadlineError):
        value_annuities(tables, items, Valuation(0.04), deadline=0.0)


def test_a_life_with_little_of_its_last_year_left_keeps_its_digits():
    # q = 1 in the life's year (multiplier 25) and 1.9e-5 of the year left after the first
    # weekly payment: under UDD S(x + t) / S(x) = (1 - s) / (1 - f) within the year
    # (common practice), f = 0.98051934..., s = f + 1/52. Exact in mpmath from the same
    # binary age; both the small and the column path must keep 1e-12 relative.
    age = 123.98051934022381
    with mp.workdps(40):
        f = mpf(age) - 123
        v = 1 / mpf("1.04")
        expected = float(v ** (mpf(1) / 52) * (1 - (f + mpf(1) / 52)) / (1 - f) / 52)
    tables = [models.susm()]
    if tables[0].last_age <= 124:
        pytest.skip("the table must run past age 124")
    item = Item((Life(age, mortality_multiplier=1e6),), Payments("arrears", 52))
    valuation = Valuation(0.04)
    alone = value_annuities(tables, [item], valuation).value[0]
    batch = value_annuities(tables, [item] * (small.SMALL_BATCH + 1), valuation).value
    assert alone == pytest.approx(expected, rel=1e-12)
    np.testing.assert_allclose(batch, expected, rtol=1e-12)


def _chains_only(monkeypatch):
    """Make small._value_row value every life from its own chain (no table-wide column)."""
    monkeypatch.setattr(small, "_column", lambda *args: None)


@pytest.mark.parametrize("rate", [0.04, -0.01, 0.5])
def test_the_table_wide_column_and_each_life_s_own_chain_agree(bases, rate, monkeypatch):
    # A one-item batch is valued from the column of its (table, multiplier, flat extra,
    # escalation), kept between calls; with the columns switched off, from the life's own
    # chain. Both agree with the general path to 1e-12 relative.
    rng = np.random.default_rng(4300 + int(rate * 100))
    valuation = Valuation(rate)
    for basis in bases:
        items = _valid(basis.tables, _random_items(rng, basis.tables, 40), valuation)
        general = value_annuities(basis.tables, items, valuation, fast=False).value
        small._column.cache_clear()
        by_column = [value_annuities(basis.tables, [item], valuation).value[0]
                     for item in items]
        assert small._column.cache_info().hits > 0  # the columns were used, and kept
        with monkeypatch.context() as patch:
            _chains_only(patch)
            by_chain = [value_annuities(basis.tables, [item], valuation).value[0]
                        for item in items]
        np.testing.assert_allclose(by_column, general, rtol=RTOL, atol=0)
        np.testing.assert_allclose(by_chain, general, rtol=RTOL, atol=0)


def test_a_column_that_died_before_the_life_s_age_leaves_the_life_to_its_chain():
    # An invented table whose rate at 62 is 0.6: with a multiplier of 2 the column of
    # (table, 2, 0) is dead from 63, but a life aged 64 (rate 0.1 x 2) is alive. Its value
    # is the definition, summed here year by year: sum_k v^k prod_(j<k) (1 - q'(64 + j)).
    q = [0.01, 0.02, 0.6, 0.05, 0.1, 0.2, 0.3, 1.0]  # ages 60 to 67
    table = MortalityTable.of(60, q)
    item = Item((Life(64.0, mortality_multiplier=2.0),), Payments("advance", 1))
    v = 1 / 1.05
    expected, alive = 0.0, 1.0
    for k, rate in enumerate(q[4:]):
        expected += v**k * alive
        alive *= 1 - min(2 * rate, 1.0)
    small._column.cache_clear()
    got = value_annuities([table], [item], Valuation(0.05)).value[0]
    assert small._column(table, 2.0, 0.0, -math.log(1.05)).life[64 - 60] == 0.0
    assert got == pytest.approx(expected, rel=1e-14)


def test_whole_years_from_the_column_agree_with_the_sum_term_by_term():
    # _whole_years takes a difference of prefix or suffix sums (or sums directly where that
    # would cancel): against the sum term by term over the same lives, for every span of
    # years, at rates that make the early or the late years dominate.
    table = models.susm()
    span = table.last_age - table.first_age
    for lw in (-0.7, -0.05, 0.0, 0.03, 0.4):
        column = small._column(table, 1.0, 0.0, lw)
        assert column.ok
        for base in range(0, span, 7):
            for lo in range(1, span - base, 5):
                for hi in range(lo + 1, min(span - base + 2, lo + 60), 3):
                    got = small._whole_years(column, column.life, base, lo, hi, lw, 0.4, 0.6)
                    want = small._whole_years(None, column.life, base, lo, hi, lw, 0.4, 0.6)
                    assert got == pytest.approx(want, rel=1e-12, abs=0)


def test_values_given_as_lists_are_the_arrays_values(bases):
    # value_annuities(listed=True) gives value and method_code as lists: the same numbers
    # as the arrays (tolist) on each path, a few items in floats, a batch on columns, a
    # curve on the general path.
    from service.engine.curves import Curve

    rng = np.random.default_rng(4177)
    basis = bases[0]
    flat = Valuation(0.035)
    curve = Curve.from_mapping({"kind": "spot", "terms": [1.0, 10.0], "rates": [0.02, 0.04]})
    for valuation in (flat, Valuation(curve)):
        items = _valid(basis.tables, _random_items(rng, basis.tables, 40), valuation)
        for batch in (items[:1], items[:small.SMALL_BATCH], items):
            arrays = value_annuities(basis.tables, batch, valuation)
            lists = value_annuities(basis.tables, batch, valuation, listed=True)
            assert type(lists.value) is list and type(lists.method_code) is list
            assert lists.value == arrays.value.tolist()
            assert lists.method_code == arrays.method_code.tolist()
            assert lists.methods == arrays.methods
            assert lists.method(0) == arrays.method(0)
