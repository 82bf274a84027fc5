"""Discrete (annual and m-thly) annuities against a direct sum of amount x v^t x t_p_x."""

import math

import numpy as np
import numpy_financial as npf
import pytest
from numpy.testing import assert_allclose

from service.engine.annuity import Item, Life, Payments, Valuation, annuity_values
from service.engine.survival import build_lives
from tests.reference import models
from tests.reference.direct import DirectLife, discrete_value

ASSUMPTIONS = ("udd", "constant-force", "balducci")
RATE = 0.05
TIMINGS = (("advance", 1), ("arrears", 1), ("advance", 2), ("arrears", 4), ("advance", 12))
#: (term, deferral, guarantee, escalation), whole years
SHAPES = (
    (None, 0.0, 0.0, 0.0),
    (10.0, 0.0, 0.0, 0.0),
    (None, 3.0, 0.0, 0.0),
    (None, 0.0, 5.0, 0.0),
    (12.0, 2.0, 7.0, 0.0),
    (None, 1.0, 0.0, 0.03),
    (20.0, 0.0, 10.0, 0.05),
)


def engine(table, life, assumption, timing, m, term=None, deferral=0.0, guarantee=0.0,
           escalation=0.0):
    item = Item((life,), Payments(timing=timing, frequency=m, term=term, deferral=deferral,
                                  guarantee=guarantee, escalation=escalation))
    return annuity_values([table], [item], Valuation(RATE, assumption))[0]


def direct(life, timing, m, term=None, deferral=0.0, guarantee=0.0, escalation=0.0):
    return discrete_value([life], RATE, frequency=m, timing=timing, term=term, deferral=deferral,
                          guarantee=guarantee, escalation=escalation)


class TestFractionalAges:
    @pytest.mark.parametrize("shape", SHAPES)
    @pytest.mark.parametrize(("timing", "m"), TIMINGS)
    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize(("table_name", "age"), (("susm", 65.25), ("susm", 70.5),
                                                     ("susm", 20.75), ("susm_short", 98.6)))
    def test_against_direct_sum(self, table_name, age, assumption, timing, m, shape):
        table = getattr(models, table_name)()
        got = engine(table, Life(age), assumption, timing, m, *shape)
        life = DirectLife.of(table.q, table.first_age, age, assumption)
        assert_allclose(got, direct(life, timing, m, *shape), rtol=1e-11, atol=0)

    @pytest.mark.parametrize("shape", ((12.75, 2.25, 7.5, 0.0), (6.25, 0.75, 0.25, 0.02)))
    @pytest.mark.parametrize(("timing", "m"), (("advance", 4), ("arrears", 12)))
    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize("age", (65.25, 81.9))
    def test_part_year_windows(self, age, assumption, timing, m, shape):
        table = models.susm()
        got = engine(table, Life(age), assumption, timing, m, *shape)
        life = DirectLife.of(table.q, table.first_age, age, assumption)
        assert_allclose(got, direct(life, timing, m, *shape), rtol=1e-11, atol=0)


class TestSelectDurations:
    @pytest.mark.parametrize(("timing", "m"), (("advance", 1), ("arrears", 12)))
    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize(("age", "duration"), (
        (30.0, 0), (30.0, 1), (30.0, 2), (30.0, 7), (65.4, 0), (65.4, 1), (21.0, 1), (127.5, 1),
    ))
    def test_against_direct_sum(self, age, duration, assumption, timing, m):
        table = models.susm_select()
        got = engine(table, Life(age, duration=duration), assumption, timing, m, 15.0, 1.0,
                     2.0, 0.01)
        life = DirectLife.of(table.q, table.first_age, age, assumption,
                             select_factors=models.SELECT_FACTORS, duration=duration)
        expected = direct(life, timing, m, 15.0, 1.0, 2.0, 0.01)
        assert_allclose(got, expected, rtol=1e-11, atol=0)

    @pytest.mark.parametrize("age", (30.0, 65.5))
    def test_duration_past_select_period_is_ultimate(self, age):
        table = models.susm_select()
        after = engine(table, Life(age, duration=2), "udd", "advance", 12)
        ultimate = engine(table, Life(age), "udd", "advance", 12)
        assert_allclose(after, ultimate, rtol=1e-14, atol=0)


class TestAgeAdjustment:
    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize(("age", "adjustment"), ((65.0, -3.0), (65.0, 2.5), (70.25, -0.5),
                                                     (40.0, 0.75)))
    def test_values_the_adjusted_age(self, age, adjustment, assumption):
        table = models.susm()
        got = engine(table, Life(age, age_adjustment=adjustment), assumption, "advance", 4,
                     None, 0.0, 5.0)
        life = DirectLife.of(table.q, table.first_age, age + adjustment, assumption)
        assert_allclose(got, direct(life, "advance", 4, None, 0.0, 5.0), rtol=1e-11, atol=0)


class TestMortalityMultiplier:
    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize(("table_name", "age", "multiplier"), (
        ("susm", 65.0, 1.5),
        ("susm", 65.5, 3.0),
        ("susm", 40.0, 0.5),
        ("susm", 70.25, 0.0),
        ("susm", 110.0, 40.0),
        ("susm_short", 90.75, 2.0),
        ("susm_short", 100.0, 5.0),
    ))
    @pytest.mark.parametrize(("timing", "m"), (("advance", 1), ("arrears", 12)))
    def test_rates_multiplied_and_capped(self, table_name, age, multiplier, assumption, timing,
                                         m):
        table = getattr(models, table_name)()
        got = engine(table, Life(age, mortality_multiplier=multiplier), assumption, timing, m,
                     30.0)
        life = DirectLife.of(table.q, table.first_age, age, assumption, multiplier=multiplier)
        assert_allclose(got, direct(life, timing, m, 30.0), rtol=1e-11, atol=0)

    def test_multiplier_zero_is_an_annuity_certain(self):
        got = engine(models.susm(), Life(40.0, mortality_multiplier=0.0), "udd", "advance", 12,
                     25.0)
        rate = 1.05 ** (1 / 12) - 1
        # numpy-financial pv: 300 monthly payments of 1/12 in advance
        assert_allclose(got, npf.pv(rate, 300, -1 / 12, 0.0, when="begin"), rtol=1e-12, atol=0)


class TestMultiplierBelowOneAtTableEnd:
    """A multiplier below one also scales the table's closing rate q = 1.

    Whatever the engine does with a life that outlives the table, survival must not rise
    and a whole-life annuity-due must exceed the annuity-immediate by the first payment.
    """

    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize("m", (1, 12))
    def test_advance_minus_arrears_is_first_payment(self, assumption, m):
        table = models.susm_short()
        life = Life(100.0, mortality_multiplier=0.5)
        advance = engine(table, life, assumption, "advance", m)
        arrears = engine(table, life, assumption, "arrears", m)
        # common practice: a-due^(m) = a^(m) + 1/m for whole-life annuities
        assert_allclose(advance - arrears, 1.0 / m, rtol=1e-12, atol=0)

    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    def test_survival_never_rises(self, assumption):
        table = models.susm_short()
        lives, problems = build_lives([table], [0], [100.0], [math.inf], [0.5], assumption)
        assert not problems
        times = np.linspace(0.0, 10.0, 401)
        survival = lives.survival(np.zeros(times.size, dtype=np.intp), times)
        assert np.all(np.diff(survival) <= 0.0)


class TestGuaranteedPart:
    """Guaranteed payments against numpy-financial's pv (annuity certain)."""

    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize(("timing", "m", "term"), (("advance", 1, 10.0), ("arrears", 1, 10.0),
                                                       ("advance", 12, 5.5), ("arrears", 4, 7.25)))
    def test_guarantee_equal_to_term(self, assumption, timing, m, term):
        got = engine(models.susm(), Life(85.0), assumption, timing, m, term, 0.0, term)
        rate = 1.05 ** (1 / m) - 1
        when = "begin" if timing == "advance" else "end"
        # numpy-financial pv of term x m payments of 1/m
        expected = npf.pv(rate, round(term * m), -1 / m, 0.0, when=when)
        assert_allclose(got, expected, rtol=1e-12, atol=0)

    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    def test_escalating_guarantee(self, assumption):
        r = 0.03
        got = engine(models.susm(), Life(85.0), assumption, "advance", 1, 10.0, 0.0, 10.0, r)
        # numpy-financial pv at (1 + i)/(1 + r) - 1 (common practice: compound escalation)
        expected = npf.pv(1.05 / (1 + r) - 1, 10, -1.0, 0.0, when="begin")
        assert_allclose(got, expected, rtol=1e-12, atol=0)

    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize(("age", "m", "guarantee"), ((65.0, 1, 5.0), (70.5, 12, 10.0),
                                                         (88.25, 4, 2.75)))
    def test_certain_and_life(self, assumption, age, m, guarantee):
        table = models.susm()
        got = engine(table, Life(age), assumption, "advance", m, None, 0.0, guarantee)
        life = DirectLife.of(table.q, table.first_age, age, assumption)
        n = round(guarantee * m)
        rate = 1.05 ** (1 / m) - 1
        # numpy-financial pv for the certain part; the rest is the deferred life annuity
        certain = npf.pv(rate, n, -1 / m, 0.0, when="begin")
        after = sum(1.05 ** (-j / m) * life.survival(j / m) / m
                    for j in range(n, math.ceil(life.horizon * m) + 2))
        assert_allclose(got, certain + after, rtol=1e-11, atol=0)

    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    def test_deferred_guarantee_needs_the_life_alive(self, assumption):
        table = models.susm()
        got = engine(table, Life(75.0), assumption, "advance", 12, 5.0, 3.0, 5.0)
        life = DirectLife.of(table.q, table.first_age, 75.0, assumption)
        # numpy-financial pv, times v^u u_p_x (common practice)
        expected = 1.05**-3 * life.survival(3.0) * npf.pv(1.05 ** (1 / 12) - 1, 60, -1 / 12,
                                                          0.0, when="begin")
        assert_allclose(got, expected, rtol=1e-12, atol=0)


class TestDailyPayments:
    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    def test_against_direct_sum(self, assumption):
        table = models.susm()
        got = engine(table, Life(77.3), assumption, "advance", 365, 20.0)
        life = DirectLife.of(table.q, table.first_age, 77.3, assumption)
        assert_allclose(got, direct(life, "advance", 365, 20.0), rtol=1e-10, atol=0)

    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    def test_close_to_continuous_plus_half_a_payment(self, assumption):
        table = models.susm()
        daily = engine(table, Life(66.0), assumption, "advance", 365)
        continuous = engine(table, Life(66.0), assumption, "continuous", 1)
        # common practice: a-due^(m) ~ a-bar + 1/(2m); the next term is O(1/m^2)
        assert_allclose(daily, continuous + 1 / 730, rtol=0, atol=1e-5)
