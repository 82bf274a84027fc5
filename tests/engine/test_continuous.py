"""Continuous annuities against numerical integration of rate(t) v^t t_p_x."""

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose

from service.engine.annuity import Item, Life, Payments, Valuation, annuity_values
from tests.reference import models
from tests.reference.direct import DirectLife, continuous_value

ASSUMPTIONS = ("udd", "constant-force", "balducci")
RATE = 0.05

#: (term, deferral, guarantee, escalation)
SHAPES = (
    (None, 0.0, 0.0, 0.0),
    (10.0, 0.0, 0.0, 0.0),
    (7.3, 0.0, 0.0, 0.0),
    (None, 5.0, 0.0, 0.0),
    (None, 2.6, 0.0, 0.0),
    (None, 0.0, 5.0, 0.0),
    (12.0, 3.5, 4.25, 0.0),
    (None, 0.0, 0.0, 0.03),
    (15.5, 2.0, 6.5, 0.025),
)


def engine(table, age, assumption, term, deferral, guarantee, escalation, **life_options):
    item = Item((Life(age, **life_options),),
                Payments(timing="continuous", term=term, deferral=deferral,
                         guarantee=guarantee, escalation=escalation))
    return annuity_values([table], [item], Valuation(RATE, assumption))[0]


class TestContinuousSingleLife:
    @pytest.mark.parametrize(("term", "deferral", "guarantee", "escalation"), SHAPES)
    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize(("table_name", "age"), (("susm", 65.0), ("susm", 70.5),
                                                     ("susm_short", 92.25)))
    def test_against_quad(self, table_name, age, assumption, term, deferral, guarantee,
                          escalation):
        table = getattr(models, table_name)()
        got = engine(table, age, assumption, term, deferral, guarantee, escalation)
        life = DirectLife.of(table.q, table.first_age, age, assumption)
        expected = continuous_value([life], RATE, term=term, deferral=deferral,
                                    guarantee=guarantee, escalation=escalation)
        assert_allclose(got, expected, rtol=1e-9, atol=0)

    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize(("age", "duration", "multiplier", "adjustment"), (
        (40.0, 0, 1.0, 0.0),
        (66.4, 1, 1.0, 0.0),
        (65.0, None, 2.5, 0.0),
        (65.0, None, 0.5, 0.0),
        (65.0, None, 1.0, -3.25),
        (70.0, 0, 1.7, 1.5),
    ))
    def test_select_and_adjusted_lives(self, assumption, age, duration, multiplier, adjustment):
        table = models.susm_select()
        got = engine(table, age, assumption, 20.0, 1.0, 3.0, 0.02, duration=duration,
                     mortality_multiplier=multiplier, age_adjustment=adjustment)
        exact_age = age + adjustment
        life = DirectLife.of(table.q, table.first_age, exact_age, assumption,
                             select_factors=models.SELECT_FACTORS, duration=duration,
                             multiplier=multiplier)
        expected = continuous_value([life], RATE, term=20.0, deferral=1.0, guarantee=3.0,
                                    escalation=0.02)
        assert_allclose(got, expected, rtol=1e-9, atol=0)


class TestContinuousGuaranteedPart:
    """A guarantee as long as the term leaves an annuity certain (common practice)."""

    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize(("term", "escalation"), ((10.0, 0.0), (7.5, 0.0), (10.0, 0.04)))
    def test_certain_from_now(self, assumption, term, escalation):
        got = engine(models.susm(), 80.0, assumption, term, 0.0, term, escalation)
        delta = math.log1p(RATE)
        whole = math.floor(term)
        steps = np.arange(whole)
        # common practice: a-bar-certain for each year, (1 - v) / delta, grown and discounted
        expected = np.sum((1 + escalation) ** steps * (1 + RATE) ** -steps) * -math.expm1(-delta) \
            / delta
        expected += (1 + escalation) ** whole * (1 + RATE) ** -whole \
            * -math.expm1(-delta * (term - whole)) / delta
        assert_allclose(got, expected, rtol=1e-12, atol=0)

    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    def test_certain_after_deferral_needs_the_life_alive(self, assumption):
        table = models.susm()
        got = engine(table, 80.5, assumption, 10.0, 4.5, 10.0, 0.0)
        life = DirectLife.of(table.q, table.first_age, 80.5, assumption)
        delta = math.log1p(RATE)
        # common practice: v^u u_p_x a-bar-certain
        expected = (1 + RATE) ** -4.5 * life.survival(4.5) * -math.expm1(-10 * delta) / delta
        assert_allclose(got, expected, rtol=1e-12, atol=0)


class TestContinuousAtZeroAndNegativeInterest:
    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize("i", (0.0, -0.02, 1e-9))
    def test_against_quad(self, assumption, i):
        table = models.susm()
        item = Item((Life(60.5),), Payments(timing="continuous", deferral=1.25, guarantee=2.0,
                                            escalation=0.01))
        got = annuity_values([table], [item], Valuation(i, assumption))[0]
        life = DirectLife.of(table.q, table.first_age, 60.5, assumption)
        expected = continuous_value([life], i, deferral=1.25, guarantee=2.0, escalation=0.01)
        assert_allclose(got, expected, rtol=1e-9, atol=0)


class TestBalducciNearZeroInterest:
    """Regression: the exponential-integral form cancelled (or gave inf) as delta went to 0."""

    @pytest.mark.parametrize("delta", (5e-324, 1e-300, 1e-12, 1e-8, 1e-4, -1e-6))
    @pytest.mark.parametrize(("q", "r", "length"), ((0.9, 0.0, 1.0), (0.7, 0.3, 0.25),
                                                    (0.99, 0.5, 1e-3)))
    def test_single_year_against_quad(self, delta, q, r, length):
        from scipy.integrate import quad

        from service.engine.integrals import balducci

        p = 1 - q
        # The integral's definition, integrated numerically by scipy.
        expected, _ = quad(lambda h: np.exp(-delta * h) * p / (p + q * (r + h)), 0, length,
                           epsabs=0, epsrel=1e-13)
        assert_allclose(balducci(q, r, delta, length), expected, rtol=1e-12)
