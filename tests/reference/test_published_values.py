"""Engine results against published values, published formulas and closed forms."""

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose

from service.engine import interest
from service.engine.annuity import Item, Life, Payments, Valuation, annuity_values
from service.engine.tables import MortalityTable
from tests.reference import models
from tests.reference.direct import DirectLife, discrete_value, makeham_p, rate_chain

ASSUMPTIONS = ("udd", "constant-force", "balducci")


def value(table, item, interest_rate, assumption="udd", approximation="exact"):
    return annuity_values([table], [item], Valuation(interest_rate, assumption, approximation))[0]


def whole_life(age, **payments):
    return Item((Life(age),), Payments(**payments))


class TestStandardUltimateSurvivalModel:
    """Whole-life annuity-due and insurance at 5% under the SUSM, annual payments."""

    PUBLISHED = (
        (20, 19.9664, 0.04922),
        (40, 18.4578, 0.12106),
        (60, 14.9041, 0.29028),
        (65, 13.5498, 0.35477),
    )

    @pytest.mark.parametrize(("age", "a_due", "insurance"), PUBLISHED)
    def test_annuity_due(self, age, a_due, insurance):
        got = value(models.susm(), whole_life(age), 0.05)
        # Dickson, Hardy and Waters, Actuarial Mathematics for Life Contingent Risks, Standard
        # Ultimate Survival Model tables, printed to 4 or 5 decimals (recalled from memory)
        assert_allclose(got, a_due, rtol=0, atol=0.5e-4)

    @pytest.mark.parametrize(("age", "a_due", "insurance"), PUBLISHED)
    def test_insurance_from_annuity(self, age, a_due, insurance):
        d = 0.05 / 1.05
        got = 1.0 - d * value(models.susm(), whole_life(age), 0.05)
        # Dickson, Hardy and Waters, Actuarial Mathematics for Life Contingent Risks, Standard
        # Ultimate Survival Model tables, printed to 4 or 5 decimals (recalled from memory)
        assert_allclose(got, insurance, rtol=0, atol=0.5e-5)

    @pytest.mark.parametrize(("age", "a_due", "insurance"), PUBLISHED)
    def test_insurance_by_summing_deferred_deaths(self, age, a_due, insurance):
        table = models.susm()
        q = table.q[age - table.first_age:]
        alive = np.concatenate([[1.0], np.cumprod(1.0 - q)[:-1]])
        v = 1.0 / 1.05
        got = np.sum(v ** np.arange(1, q.size + 1) * alive * q)
        # Dickson, Hardy and Waters, Actuarial Mathematics for Life Contingent Risks, Standard
        # Ultimate Survival Model tables, printed to 4 or 5 decimals (recalled from memory)
        assert_allclose(got, insurance, rtol=0, atol=0.5e-5)


class TestIllustrativeLifeTable:
    """Whole-life values at age 65 at 6%."""

    def test_annuity_due(self):
        got = value(models.ilt(), whole_life(65), 0.06)
        # Bowers, Gerber, Hickman, Jones and Nesbitt, Actuarial Mathematics (2nd ed.),
        # Illustrative Life Table (recalled from memory)
        assert_allclose(got, 9.8969, rtol=0, atol=0.5e-4)

    def test_insurance_per_thousand(self):
        got = 1000.0 * (1.0 - 0.06 / 1.06 * value(models.ilt(), whole_life(65), 0.06))
        # Bowers, Gerber, Hickman, Jones and Nesbitt, Actuarial Mathematics (2nd ed.),
        # Illustrative Life Table (recalled from memory)
        assert_allclose(got, 439.80, rtol=0, atol=0.005)


def udd_constants(i, m):
    i_m = interest.nominal_interest(i, m)
    d_m = interest.nominal_discount(i, m)
    d = i / (1 + i)
    return i * d / (i_m * d_m), (i - i_m) / (i_m * d_m)


class TestUddMthlyConstants:
    def test_alpha_and_beta_at_six_percent_monthly(self):
        alpha, beta = udd_constants(0.06, 12)
        # Bowers et al., Actuarial Mathematics, chapter on life annuities, the UDD m-thly
        # functions at 6% (recalled from memory)
        assert_allclose(alpha, 1.00028, rtol=0, atol=0.5e-5)
        # Bowers et al., Actuarial Mathematics, chapter on life annuities, the UDD m-thly
        # functions at 6% (recalled from memory)
        assert_allclose(beta, 0.46812, rtol=0, atol=0.5e-5)

    @pytest.mark.parametrize(("table_name", "age", "i", "m"), (
        ("ilt", 13, 0.06, 12),
        ("ilt", 65, 0.06, 12),
        ("ilt", 100, 0.06, 12),
        ("susm", 20, 0.05, 12),
        ("susm", 65, 0.05, 4),
        ("susm", 90, 0.05, 2),
        ("susm", 129, 0.05, 12),
        ("susm", 130, 0.05, 12),
        ("susm_short", 70, 0.03, 12),
        ("susm_short", 104, 0.03, 4),
    ))
    def test_mthly_whole_life_is_alpha_times_annual_minus_beta(self, table_name, age, i, m):
        table = getattr(models, table_name)()
        alpha, beta = udd_constants(i, m)
        annual = value(table, whole_life(age), i)
        mthly = value(table, whole_life(age, frequency=m), i)
        # Bowers et al., Actuarial Mathematics, chapter on life annuities (exact under UDD)
        assert_allclose(mthly, alpha * annual - beta, rtol=1e-10, atol=0)


def law_force(age):
    """mu(x) = A + B c^x of the Standard Ultimate Survival Model (its definition)."""
    return models.SUSM["A"] + models.SUSM["B"] * models.SUSM["c"] ** age


#: How far three-term Woolhouse may sit from the telescoped textbook formula: the years near
#: the table's closing age, where the formula leaves its bounds, are summed exactly instead.
#: Their weight from age 80 at 5% is below this (measured: 4e-12 at 80, 1e-14 at 65).
TELESCOPED_TOLERANCE = 1e-10


class TestWoolhouse:
    """Woolhouse's formula against the engine's woolhouse-2 and woolhouse-3 values."""

    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize(("age", "m"), ((21, 12), (45, 2), (65, 4), (65, 12), (100, 12)))
    def test_two_terms_whole_life(self, assumption, age, m):
        table = models.susm()
        annual = value(table, whole_life(age), 0.05, assumption)
        got = value(table, whole_life(age, frequency=m), 0.05, assumption, "woolhouse-2")
        # Dickson, Hardy and Waters, chapter on annuities
        expected = annual - (m - 1) / (2 * m)
        assert_allclose(got, expected, rtol=1e-12, atol=0)

    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize(("age", "m"), ((20, 12), (21, 12), (35, 2), (45, 2), (50, 4),
                                            (65, 4), (65, 12), (80, 12), (80, 365)))
    def test_three_terms_whole_life(self, assumption, age, m):
        table = models.susm()
        delta = math.log(1.05)
        annual = value(table, whole_life(age), 0.05, assumption)
        got = value(table, whole_life(age, frequency=m), 0.05, assumption, "woolhouse-3")
        # Dickson, Hardy and Waters, chapter on annuities: a-due^(m) = a-due - (m-1)/(2m)
        # - (m^2-1)/(12 m^2) (delta + mu(x)), with the law's own force mu(x).
        mu = law_force(age)
        expected = annual - (m - 1) / (2 * m) - (m * m - 1) / (12 * m * m) * (delta + mu)
        assert_allclose(got, expected, rtol=0, atol=TELESCOPED_TOLERANCE)

    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize(("age", "m"), ((65, 12), (110, 4)))
    def test_three_terms_whole_life_is_finite_and_below_two_terms(self, assumption, age, m):
        table = models.susm()
        two = value(table, whole_life(age, frequency=m), 0.05, assumption, "woolhouse-2")
        three = value(table, whole_life(age, frequency=m), 0.05, assumption, "woolhouse-3")
        assert np.isfinite(three)
        # Dickson, Hardy and Waters, chapter on annuities: the third term,
        # -(m^2 - 1)/(12 m^2) (delta + mu), is negative
        assert three < two

    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize(("age", "term", "m"), ((40, 25, 12), (65, 10, 4), (80, 5, 2)))
    def test_two_terms_temporary(self, assumption, age, term, m):
        table = models.susm()
        v_n_p = (1.05 ** -term) * np.prod(1 - table.q[age - 20: age - 20 + term])
        annual = value(table, whole_life(age, term=term), 0.05, assumption)
        got = value(table, whole_life(age, frequency=m, term=term), 0.05, assumption,
                    "woolhouse-2")
        # common practice (the whole-life form at x less v^n n_p_x times the form at x + n)
        expected = annual - (m - 1) / (2 * m) * (1 - v_n_p)
        assert_allclose(got, expected, rtol=1e-12, atol=0)

    @pytest.mark.parametrize(("age", "deferral", "m"), ((40, 25, 12), (65, 10, 4), (80, 5, 2)))
    def test_three_terms_deferred_udd(self, age, deferral, m):
        table = models.susm()
        delta = math.log(1.05)
        v_n_p = (1.05 ** -deferral) * np.prod(1 - table.q[age - 20: age - 20 + deferral])
        annual = value(table, whole_life(age, deferral=deferral), 0.05)
        got = value(table, whole_life(age, frequency=m, deferral=deferral), 0.05, "udd",
                    "woolhouse-3")
        mu = law_force(age + deferral)
        # Dickson, Hardy and Waters, chapter on annuities (applied at age x + n and
        # discounted with v^n n_p_x: common practice)
        expected = annual - v_n_p * ((m - 1) / (2 * m) + (m * m - 1) / (12 * m * m) * (delta + mu))
        assert_allclose(got, expected, rtol=0, atol=TELESCOPED_TOLERANCE)


def constant_force_table(mu, last_age):
    q = np.full(last_age + 1, -math.expm1(-mu))
    q[-1] = 1.0
    return MortalityTable.of(0, q)


class TestConstantForceClosedForms:
    """Constant q up to a very high age: the tail beyond it is below 1e-13 of the value."""

    LAST_AGE = 800
    CASES = ((0.01, 0.04), (0.02, 0.05), (0.05, 0.0), (0.1, 0.08))

    @pytest.mark.parametrize(("mu", "i"), CASES)
    @pytest.mark.parametrize("age", (0.0, 10.0, 37.3))
    def test_continuous(self, mu, i, age):
        table = constant_force_table(mu, self.LAST_AGE)
        assert math.exp(-(mu + math.log1p(i)) * (self.LAST_AGE - age)) < 1e-13
        got = value(table, whole_life(age, timing="continuous"), i, "constant-force")
        # any life-contingencies text
        assert_allclose(got, 1.0 / (mu + math.log1p(i)), rtol=1e-12, atol=0)

    @pytest.mark.parametrize(("mu", "i"), CASES)
    @pytest.mark.parametrize("m", (1, 2, 4, 12))
    @pytest.mark.parametrize("age", (0.0, 37.3))
    def test_mthly_advance(self, mu, i, m, age):
        table = constant_force_table(mu, self.LAST_AGE)
        got = value(table, whole_life(age, frequency=m), i, "constant-force")
        # any life-contingencies text
        expected = (1.0 / m) / (1.0 - math.exp(-(mu + math.log1p(i)) / m))
        assert_allclose(got, expected, rtol=1e-12, atol=0)

    @pytest.mark.parametrize(("mu", "i"), CASES)
    @pytest.mark.parametrize("m", (1, 12))
    def test_mthly_arrears(self, mu, i, m):
        table = constant_force_table(mu, self.LAST_AGE)
        got = value(table, whole_life(0.0, frequency=m, timing="arrears"), i, "constant-force")
        # any life-contingencies text; in arrears the first payment of 1/m is missing
        # (common practice)
        expected = (1.0 / m) / (1.0 - math.exp(-(mu + math.log1p(i)) / m)) - 1.0 / m
        assert_allclose(got, expected, rtol=1e-12, atol=0)


class TestCompoundEscalation:
    """Escalation r at interest i against level payments at (1 + i)/(1 + r) - 1."""

    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize(("age", "i", "r", "term"), (
        (40, 0.05, 0.02, None),
        (65, 0.05, 0.05, None),
        (65, 0.04, 0.06, None),
        (70.5, 0.05, 0.03, 15),
        (60, 0.03, 0.01, 1),
    ))
    def test_annual_advance(self, assumption, age, i, r, term):
        table = models.susm()
        escalating = value(table, whole_life(age, term=term, escalation=r), i, assumption)
        level = value(table, whole_life(age, term=term), (1 + i) / (1 + r) - 1, assumption)
        # common practice (no source)
        assert_allclose(escalating, level, rtol=1e-12, atol=0)

    @pytest.mark.parametrize(("age", "i", "r", "deferral"), ((40, 0.05, 0.02, 25),
                                                             (65, 0.04, 0.03, 5)))
    def test_annual_advance_deferred(self, age, i, r, deferral):
        table = models.susm()
        escalating = value(table, whole_life(age, deferral=deferral, escalation=r), i)
        level = value(table, whole_life(age, deferral=deferral), (1 + i) / (1 + r) - 1)
        # common practice (no source); the discount over the deferral is v^u, not v'^u
        assert_allclose(escalating, level / (1 + r) ** deferral, rtol=1e-12, atol=0)

    @pytest.mark.parametrize(("age", "i", "r"), ((40, 0.05, 0.02), (65, 0.04, 0.03)))
    def test_annual_arrears(self, age, i, r):
        table = models.susm()
        escalating = value(table, whole_life(age, timing="arrears", escalation=r), i)
        level = value(table, whole_life(age, timing="arrears"), (1 + i) / (1 + r) - 1)
        # common practice (no source); each payment is discounted one year at i, not at i'
        assert_allclose(escalating, level / (1 + r), rtol=1e-12, atol=0)


class TestStandardSelectModel:
    """Select lives against a direct sum using q[x]+s = 0.9^(2-s) q(x+s)."""

    @staticmethod
    def law_rates():
        law = models.SUSM
        ages = range(models.SUSM_FIRST_AGE, 131)
        q = [1.0 - makeham_p(law["A"], law["B"], law["c"], x) for x in ages]
        q[-1] = 1.0
        return q

    @pytest.mark.parametrize(("age", "duration"), (
        (20, 0), (30, 0), (55, 0), (65, 0), (65, 1), (66, 1), (70.5, 0), (70.5, 1), (80, 2),
        (128, 0),
    ))
    @pytest.mark.parametrize(("timing", "m"), (("advance", 1), ("advance", 12), ("arrears", 4)))
    def test_select_life(self, age, duration, timing, m):
        table = models.susm_select()
        item = Item((Life(age, duration=duration),), Payments(timing=timing, frequency=m))
        got = value(table, item, 0.05)
        integer_age = math.floor(age)
        rates = rate_chain(self.law_rates(), models.SUSM_FIRST_AGE, integer_age,
                           select_factors=(0.9**2, 0.9), duration=duration)
        life = DirectLife(rates, age - integer_age, "udd")
        # Dickson, Hardy and Waters, Actuarial Mathematics for Life Contingent Risks, Standard
        # Select Survival Model (same book, same model family; no values recalled; the
        # definition q[x]+s = 0.9^(2-s) q(x+s) is used)
        expected = discrete_value([life], 0.05, frequency=m, timing=timing)
        assert_allclose(got, expected, rtol=1e-12, atol=0)

    @pytest.mark.parametrize("age", (30, 65))
    def test_select_value_exceeds_ultimate(self, age):
        table = models.susm_select()
        select = value(table, Item((Life(age, duration=0),)), 0.05)
        ultimate = value(table, Item((Life(age),)), 0.05)
        # common practice: lighter mortality in the select period raises the annuity
        assert select > ultimate
