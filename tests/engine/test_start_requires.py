"""Who must be alive when a deferred two-life annuity starts (start_requires)."""

import math

import pytest
from numpy.testing import assert_allclose

from service.engine.annuity import Item, Life, Payments, Valuation, annuity_values
from tests.reference import models
from tests.reference.direct import makeham_survival

RATE = 0.05
X, Y, U = 55, 52, 10
AMOUNTS = (1.0, 1.0, 0.5)  # a pension to a member and half of it to the spouse after him
TIMINGS = (("advance", 1), ("advance", 12), ("arrears", 12), ("arrears", 1), ("continuous", 1))


def value(lives, payments, amounts=AMOUNTS, start_requires="any"):
    item = Item(tuple(Life(float(a)) for a in lives), payments,
                amounts if len(lives) == 2 else (1.0, 1.0, 1.0), start_requires)
    return annuity_values([models.susm()], [item], Valuation(RATE))[0]


def survival(age, years):
    """u-year survival under the Standard Ultimate law (Makeham: published-values.md)."""
    return makeham_survival(models.SUSM["A"], models.SUSM["B"], models.SUSM["c"], age, years)


def parts(timing, m):
    """v^u, p(x), p(y), J(x+u, y+u), a(x+u), a(y+u): the pieces of the decomposition."""
    now = Payments(timing, m)
    return (math.exp(-math.log1p(RATE) * U), survival(X, U), survival(Y, U),
            value((X + U, Y + U), now), value((X + U,), now), value((Y + U,), now))


@pytest.mark.parametrize(("timing", "m"), TIMINGS)
class TestDecomposition:
    """The deferred value splits by who is alive at the end of the deferral (common
    practice): both alive, the two-life annuity from then; only one alive, that life's
    single-life annuity at its survivor amount."""

    def test_first_must_be_alive(self, timing, m):
        v, px, py, joint, ax, _ = parts(timing, m)
        expected = v * (px * py * joint + px * (1 - py) * AMOUNTS[1] * ax)
        got = value((X, Y), Payments(timing, m, deferral=U), start_requires="first")
        assert_allclose(got, expected, rtol=1e-12)

    def test_both_must_be_alive(self, timing, m):
        v, px, py, joint, _, _ = parts(timing, m)
        got = value((X, Y), Payments(timing, m, deferral=U), start_requires="both")
        assert_allclose(got, v * px * py * joint, rtol=1e-12)

    def test_any_is_unchanged(self, timing, m):
        v, px, py, joint, ax, ay = parts(timing, m)
        expected = v * (px * py * joint + px * (1 - py) * AMOUNTS[1] * ax
                        + (1 - px) * py * AMOUNTS[2] * ay)
        got = value((X, Y), Payments(timing, m, deferral=U))
        assert_allclose(got, expected, rtol=1e-12)
        assert got == value((X, Y), Payments(timing, m, deferral=U), start_requires="any")


def test_the_reported_pension():
    # Lives 55 and 52, deferral 10, monthly in advance, amounts 1, 1, 0.5: the figures given
    # when the rule was asked for (8.55887 any life; 8.41966 the member alive at 65).
    payments = Payments("advance", 12, deferral=10)
    assert round(value((55, 52), payments), 5) == 8.55887
    assert round(value((55, 52), payments, start_requires="first"), 5) == 8.41966


@pytest.mark.parametrize("requires, weight", [
    ("any", lambda px, py: px + py - px * py), ("first", lambda px, py: px),
    ("both", lambda px, py: px * py)])
def test_the_guarantee_needs_the_same_lives(requires, weight):
    # Ten years certain from the deferral, at the both-alive amount, once the requirement
    # is met: weight x v^u x the annuity-certain-due of 10 years.
    v, px, py = math.exp(-math.log1p(RATE) * U), survival(X, U), survival(Y, U)
    certain = (1 - 1.05**-10) / (RATE / 1.05)
    got = value((X, Y), Payments("advance", 1, term=10, deferral=U, guarantee=10),
                start_requires=requires)
    assert_allclose(got, AMOUNTS[0] * weight(px, py) * v * certain, rtol=1e-12)


@pytest.mark.parametrize("requires", ("any", "first", "both"))
def test_one_life_ignores_it(requires):
    payments = Payments("advance", 12, deferral=U)
    assert value((X,), payments, start_requires=requires) == value((X,), payments)
