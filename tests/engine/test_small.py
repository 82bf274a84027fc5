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
from service.engine.errors import DeadlineError, ItemError, WorkLimitError
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
        batch = [good, bad]
        got = []
        for fast in (True, False):
            try:
                value_annuities(tables, batch, valuation, fast=fast)
                got.append(None)
            except ItemError as exc:
                got.append(exc.errors)
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
