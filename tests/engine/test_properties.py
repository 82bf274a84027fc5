"""Properties of annuity values over random valid single-life items."""

import numpy as np
from hypothesis import example, given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose

from service.engine.annuity import Item, Life, Payments, Valuation, annuity_values
from tests import strategies
from tests.reference.direct import DirectLife, continuous_value, discrete_value
from tests.strategies import Case

SETTINGS = settings(max_examples=60, deadline=None)


def value(case: Case) -> float:
    return annuity_values([case.table], [case.item], case.valuation)[0]


class TestAnnuityValues:
    @SETTINGS
    @given(strategies.cases())
    def test_finite_and_positive(self, case):
        got = value(case)
        assert np.isfinite(got)
        assert got > 0

    @SETTINGS
    @given(strategies.cases(timing="advance", approximations=("woolhouse-2", "woolhouse-3")))
    @example(Case("susm", Item((Life(65.0),), Payments(frequency=12)),
                  Valuation(0.05, "constant-force", "woolhouse-3")))
    def test_approximations_are_finite(self, case):
        assert np.isfinite(value(case))

    @SETTINGS
    @given(strategies.cases(timing="advance", whole_life=True))
    @example(Case("susm_short", Item((Life(85.0, mortality_multiplier=0.5),), Payments()),
                  Valuation(0.05)))
    def test_advance_exceeds_arrears_by_first_payment(self, case):
        advance = value(case)
        arrears = value(case.with_payments(timing="arrears"))
        # common practice: a-due^(m) = a^(m) + 1/m for whole-life annuities
        assert_allclose(advance - arrears, 1.0 / case.payments.frequency, rtol=1e-9, atol=0)

    @SETTINGS
    @given(strategies.cases().filter(lambda c: c.payments.term is not None))
    def test_temporary_at_most_whole_life(self, case):
        temporary = value(case)
        whole = value(case.with_payments(term=None))
        assert temporary <= whole * (1 + 1e-12)

    @SETTINGS
    @given(strategies.cases(), strategies.multipliers())
    def test_heavier_mortality_never_raises_a_value(self, case, other):
        low, high = sorted((case.life.mortality_multiplier, other))
        lighter = value(case.with_life(mortality_multiplier=low))
        heavier = value(case.with_life(mortality_multiplier=high))
        assert heavier <= lighter * (1 + 1e-12)

    @SETTINGS
    @given(strategies.cases(), st.floats(0.005, 0.05))
    def test_higher_interest_never_raises_a_value(self, case, step):
        base = value(case)
        higher = annuity_values([case.table], [case.item],
                                Valuation(case.valuation.interest + step,
                                          case.valuation.fractional_age))[0]
        assert higher <= base * (1 + 1e-12)


def direct_life(case: Case) -> DirectLife:
    table = case.table
    return DirectLife.of(table.q, table.first_age, case.life.age, case.valuation.fractional_age,
                         multiplier=case.life.mortality_multiplier)


class TestAgainstDirectComputation:
    """Random items against the test's own sum and integral.

    Multipliers are kept at 1 or more here so that the table still closes with q = 1; how a
    life that outlives the table is treated is checked separately (see test_discrete.py).
    """

    @SETTINGS
    @given(strategies.cases(multiplier_range=(1.0, 3.0)).filter(
        lambda c: c.payments.timing != "continuous"))
    def test_discrete_sum(self, case):
        p = case.payments
        expected = discrete_value([direct_life(case)], case.valuation.interest,
                                  frequency=p.frequency, timing=p.timing, term=p.term,
                                  deferral=p.deferral, guarantee=p.guarantee,
                                  escalation=p.escalation)
        assert_allclose(value(case), expected, rtol=1e-10, atol=0)

    @settings(max_examples=25, deadline=None)
    @given(strategies.cases(timing="continuous", multiplier_range=(1.0, 3.0)))
    def test_continuous_integral(self, case):
        p = case.payments
        expected = continuous_value([direct_life(case)], case.valuation.interest, term=p.term,
                                    deferral=p.deferral, guarantee=p.guarantee,
                                    escalation=p.escalation)
        assert_allclose(value(case), expected, rtol=1e-9, atol=0)
