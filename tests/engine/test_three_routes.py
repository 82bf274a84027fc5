"""The same annuity three ways: from an insurance factor, as the expectation of the
present-value random variable, and the engine's own sum (common practice: the three routes
must agree to rounding)."""

import math

import numpy as np
import numpy_financial as npf
import pytest
from numpy.testing import assert_allclose

from service.engine.annuity import Item, Life, Payments, Valuation, annuity_values
from tests.reference import models
from tests.reference.direct import DirectLife, integrate_pieces

ASSUMPTIONS = ("udd", "constant-force", "balducci")
TIMINGS = (("advance", 1), ("arrears", 1), ("advance", 2), ("advance", 4), ("advance", 12),
           ("arrears", 12), ("continuous", 1))
LIVES = (("susm", 40.0), ("susm", 65.25), ("susm_short", 70.5), ("susm_short", 104.0))
RATE = 0.045


def direct_life(table_name, age, assumption):
    table = getattr(models, table_name)()
    return DirectLife.of(table.q, table.first_age, age, assumption)


def engine_value(table_name, age, assumption, timing, m, term):
    table = getattr(models, table_name)()
    item = Item((Life(age),), Payments(timing=timing, frequency=m, term=term))
    return annuity_values([table], [item], Valuation(RATE, assumption))[0]


def curtate_periods(life, m, term):
    """Return j = 0, 1, ... and P(the life dies in the j-th period of length 1/m).

    Periods run while the life can be alive (for life) or up to the term; the probability of
    surviving the whole term is returned separately.
    """
    count = math.ceil(life.horizon * m) + 1 if term is None else round(term * m)
    alive = np.array([life.survival(j / m) for j in range(count + 1)])
    return np.arange(count), alive[:-1] - alive[1:], (0.0 if term is None else alive[-1])


def continuous_deaths(life, term, weight):
    """Integral of weight(t) t_p_x mu(x+t) over the term, plus deaths at an instant."""
    end = life.horizon if term is None else min(term, life.horizon)
    total = integrate_pieces(lambda t: weight(t) * life.density(t), 0.0, end,
                             life.integer_age_times(0.0, end))
    for t, mass in life.death_masses():
        if t < end or term is None:
            total += weight(t) * mass
    return total


def by_insurance(life, timing, m, term):
    v = 1.0 / (1.0 + RATE)
    endow = 0.0 if term is None else v**term * life.survival(term)
    if timing == "continuous":
        delta = math.log1p(RATE)
        insurance = continuous_deaths(life, term, lambda t: v**t) + endow
        return (1.0 - insurance) / delta
    j, dies, _ = curtate_periods(life, m, term)
    insurance = np.sum(v ** ((j + 1) / m) * dies) + endow
    d_m = m * (1.0 - v ** (1.0 / m))
    advance = (1.0 - insurance) / d_m
    if timing == "advance":
        return advance
    # In arrears the payment at 0 is missing and one at the term is added (common practice).
    return advance - (1.0 - endow) / m


def by_random_variable(life, timing, m, term):
    if timing == "continuous":
        delta = math.log1p(RATE)

        def certain(t):
            return -math.expm1(-delta * t) / delta

        value = continuous_deaths(life, term, certain)
        if term is not None:
            value += life.survival(term) * certain(term)
        return value
    rate = (1.0 + RATE) ** (1.0 / m) - 1.0
    j, dies, survives_term = curtate_periods(life, m, term)
    if timing == "advance":
        paid = j + 1
        value = np.sum(dies * npf.pv(rate, paid, -1.0 / m, 0.0, when="begin"))
    else:
        paid = j
        value = np.sum(dies * npf.pv(rate, paid, -1.0 / m, 0.0, when="end"))
    if term is not None:
        value += survives_term * npf.pv(rate, round(term * m), -1.0 / m, 0.0,
                                        when="begin" if timing == "advance" else "end")
    return value


class TestThreeRoutes:
    @pytest.mark.parametrize("term", (None, 10))
    @pytest.mark.parametrize(("timing", "m"), TIMINGS)
    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize(("table_name", "age"), LIVES)
    def test_routes_agree(self, table_name, age, assumption, timing, m, term):
        life = direct_life(table_name, age, assumption)
        engine = engine_value(table_name, age, assumption, timing, m, term)
        insurance = by_insurance(life, timing, m, term)
        expectation = by_random_variable(life, timing, m, term)
        assert_allclose(engine, insurance, rtol=1e-10, atol=0)
        assert_allclose(engine, expectation, rtol=1e-10, atol=0)


class TestContinuousFromUddInsurance:
    """Under UDD at an integer age, A-bar = (i/delta) A (common practice)."""

    @pytest.mark.parametrize(("table_name", "age"), (("susm", 20), ("susm", 65), ("susm", 130),
                                                     ("susm_short", 90), ("ilt", 40)))
    def test_whole_life(self, table_name, age):
        table = getattr(models, table_name)()
        q = table.q[age - table.first_age:]
        v = 1.0 / (1.0 + RATE)
        alive = np.concatenate([[1.0], np.cumprod(1.0 - q)[:-1]])
        insurance = np.sum(v ** np.arange(1, q.size + 1) * alive * q)
        delta = math.log1p(RATE)
        expected = (1.0 - RATE / delta * insurance) / delta
        item = Item((Life(age),), Payments(timing="continuous"))
        got = annuity_values([table], [item], Valuation(RATE, "udd"))[0]
        assert_allclose(got, expected, rtol=1e-10, atol=0)


class TestBackwardRecursion:
    """a-due(x) = 1 + v p(x) a-due(x+1) from the table's end (common practice)."""

    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize(("table_name", "i"), (("susm", 0.05), ("ilt", 0.06),
                                                   ("susm_short", 0.0), ("susm", -0.01)))
    def test_every_integer_age(self, table_name, i, assumption):
        table = getattr(models, table_name)()
        ages = np.arange(table.first_age, table.last_age + 1)
        recursion = np.zeros(ages.size)
        following = 0.0
        for k in range(ages.size - 1, -1, -1):
            recursion[k] = 1.0 + (1.0 - table.q[k]) / (1.0 + i) * following
            following = recursion[k]
        items = [Item((Life(float(x)),)) for x in ages]
        got = annuity_values([table], items, Valuation(i, assumption))
        assert_allclose(got, recursion, rtol=1e-10, atol=0)
