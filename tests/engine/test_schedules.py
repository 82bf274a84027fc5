"""Expected cash-flow schedules: rows that add up to the factor and mean what they say."""

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose

from service.engine.annuity import (
    Item,
    Life,
    Payments,
    Valuation,
    annuity_values,
    cash_flow_schedule,
)
from tests.reference import models
from tests.reference.direct import DirectLife, integrate_pieces

ASSUMPTIONS = ("udd", "constant-force", "balducci")
PAYMENTS = (
    Payments(),
    Payments(timing="arrears"),
    Payments(frequency=12),
    Payments(timing="arrears", frequency=4),
    Payments(timing="continuous"),
    Payments(frequency=2, term=10.5),
    Payments(frequency=12, deferral=5.25, guarantee=3.0),
    Payments(term=15.0, guarantee=15.0, escalation=0.04),
    Payments(timing="arrears", frequency=4, term=20.0, deferral=1.0, guarantee=5.0,
             escalation=0.025),
    Payments(timing="continuous", term=12.5),
    Payments(timing="continuous", deferral=3.5, guarantee=2.25, escalation=0.03),
    Payments(timing="continuous", term=0.4),
)
LIVES = (
    (Life(65.0),),
    (Life(72.6, mortality_multiplier=1.4),),
    (Life(66.0, duration=0), Life(61.25, duration=1)),
)
SURVIVORSHIP = ((1.0, 1.0, 1.0), (1.0, 0.0, 0.0), (1.0, 0.5, 0.5), (0.0, 0.0, 1.0))


class TestScheduleSum:
    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize("payments", PAYMENTS)
    @pytest.mark.parametrize("lives", LIVES)
    def test_present_values_add_up_to_the_factor(self, lives, payments, assumption):
        tables = [models.susm_select()]
        valuation = Valuation(0.05, assumption)
        amounts = SURVIVORSHIP if len(lives) == 2 else ((1.0, 1.0, 1.0),)
        items = [Item(lives, payments, a) for a in amounts]
        factors = annuity_values(tables, items, valuation)
        for item, factor in zip(items, factors, strict=True):
            schedule = cash_flow_schedule(tables, item, valuation)
            assert_allclose(schedule.present_value.sum(), factor, rtol=1e-10, atol=1e-15)


class TestDiscreteRows:
    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize("payments", [p for p in PAYMENTS if p.timing != "continuous"])
    def test_rows_of_a_single_life(self, payments, assumption):
        table = models.susm()
        schedule = cash_flow_schedule([table], Item((Life(72.6),), payments),
                                      Valuation(0.05, assumption))
        m = payments.frequency
        j = np.arange(schedule.time.size)
        offset = 1 if payments.timing == "arrears" else 0
        assert_allclose(schedule.time, payments.deferral + (j + offset) / m, rtol=0, atol=1e-12)
        assert_allclose(schedule.payment, (1 + payments.escalation) ** (j // m) / m, rtol=1e-14)
        assert_allclose(schedule.discount, 1.05**-schedule.time, rtol=1e-13)
        assert_allclose(schedule.present_value,
                        schedule.payment * schedule.probability * schedule.discount, rtol=1e-14)
        life = DirectLife.of(table.q, table.first_age, 72.6, assumption)
        alive = np.array([life.survival(t) for t in schedule.time])
        certain = j < round(payments.guarantee * m)
        expected = np.where(certain, life.survival(payments.deferral), alive)
        assert_allclose(schedule.probability, expected, rtol=1e-12, atol=1e-300)
        assert_allclose(schedule.first_only, alive, rtol=1e-12, atol=1e-300)
        assert_allclose(schedule.both, 0.0, rtol=0, atol=0)
        assert_allclose(schedule.second_only, 0.0, rtol=0, atol=0)

    def test_rows_run_to_the_end_of_the_table(self):
        schedule = cash_flow_schedule([models.susm()], Item((Life(65.0),)), Valuation(0.05))
        # Annual payments at ages 65 to 130; at 131 no one is alive.
        assert_allclose(schedule.time, np.arange(schedule.time.size), rtol=0, atol=0)
        assert schedule.probability[schedule.time <= 65].min() > 0
        assert_allclose(schedule.probability[schedule.time > 65], 0.0, rtol=0, atol=0)


def expected_paid(life, payments, start, end):
    """Expected amount paid at rate 1 over [start, end): certain part plus life part."""
    guarantee_end = payments.deferral + payments.guarantee
    certain = max(0.0, min(end, guarantee_end) - start) * life.survival(payments.deferral)
    lo = max(start, guarantee_end)
    uncertain = 0.0
    if end > lo:
        uncertain = integrate_pieces(life.survival, lo, end, life.integer_age_times(lo, end))
    return certain + uncertain


class TestContinuousRows:
    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize("payments", [p for p in PAYMENTS if p.timing == "continuous"])
    def test_expected_payments_are_undiscounted_integrals(self, payments, assumption):
        table = models.susm()
        item = Item((Life(70.5),), payments)
        schedule = cash_flow_schedule([table], item, Valuation(0.05, assumption))
        life = DirectLife.of(table.q, table.first_age, 70.5, assumption)
        window_end = payments.deferral + (payments.term or math.inf)
        ends = np.minimum(schedule.time + 1.0, window_end)
        steps = np.rint(schedule.time - payments.deferral)
        growth = (1 + payments.escalation) ** steps
        expected = [g * expected_paid(life, payments, t, e)
                    for g, t, e in zip(growth, schedule.time, ends, strict=True)]
        # quad is asked for an absolute error of 1e-15 per piece, hence atol
        assert_allclose(schedule.payment * schedule.probability, expected, rtol=1e-9,
                        atol=1e-13)
        assert_allclose(schedule.payment, (ends - schedule.time) * growth, rtol=1e-14)
        assert_allclose(schedule.present_value,
                        schedule.payment * schedule.probability * schedule.discount, rtol=1e-12)
        assert_allclose(schedule.time, payments.deferral + steps, rtol=0, atol=1e-12)
