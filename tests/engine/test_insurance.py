"""Insurance factors against published values, textbook relations and numerical integration."""

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import integrate

from service.engine.annuity import Item, Life, Payments, Valuation, annuity_values
from service.engine.curves import Curve
from service.engine.errors import ItemError
from service.engine.insurance import Assurance, Cover, insurance_values
from tests.reference import models
from tests.reference.direct import DirectLife

ASSUMPTIONS = ("udd", "constant-force", "balducci")
WHOLE_LIFE = Cover()
ANNUAL_DUE = Payments()


def insurance(table, lives, cover=WHOLE_LIFE, interest=0.05, assumption="udd"):
    got = insurance_values([table], [Assurance(tuple(Life(float(a)) for a in lives), cover)],
                           Valuation(interest, assumption))
    return got.value[0], got.second_moment[0]


def annuity(table, lives, payments=ANNUAL_DUE, interest=0.05, assumption="udd",
            amounts=(1.0, 1.0, 1.0)):
    item = Item(tuple(Life(float(a)) for a in lives), payments, amounts)
    return annuity_values([table], [item], Valuation(interest, assumption))[0]


class TestPublishedValues:
    @pytest.mark.parametrize("age, published", [(20, 0.04922), (40, 0.12106), (60, 0.29028),
                                                (65, 0.35477)])
    def test_standard_ultimate(self, age, published):
        # Dickson, Hardy and Waters, AMLCR, Standard Ultimate Survival Model at 5%, A_x
        # (recalled from memory; shared/checks/published-values.md).
        assert_allclose(insurance(models.susm(), [age])[0], published, atol=0.5e-5)

    def test_illustrative_life_table(self):
        # Bowers et al., Actuarial Mathematics, Illustrative Life Table at 6%: 1000 A_65 =
        # 439.80 (recalled from memory).
        assert_allclose(1000 * insurance(models.ilt(), [65], interest=0.06)[0], 439.80,
                        atol=0.005)


class TestThreeRoutes:
    """The annuity and the insurance factor determine each other (common practice):
    a-due = (1 - A)/d, a-due^(m) = (1 - A^(m))/d^(m), a-bar = (1 - A-bar)/delta; for a
    temporary annuity the same with the endowment insurance."""

    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize("m", (1, 4, 12))
    @pytest.mark.parametrize("age, term", [(30, None), (65, None), (50, 15.0), (80, 7.0)])
    @pytest.mark.parametrize("interest", (0.0, 0.05, -0.01))
    def test_discrete(self, assumption, m, age, term, interest):
        timing = "end-of-year" if m == 1 else "end-of-period"
        cover = Cover("whole-life" if term is None else "endowment", term,
                      benefit_timing=timing, frequency=m)
        value, _ = insurance(models.susm(), [age], cover, interest, assumption)
        a = annuity(models.susm(), [age], Payments("advance", m, term), interest, assumption)
        d_m = -m * math.expm1(-math.log1p(interest) / m)
        assert_allclose(value, 1 - d_m * a, rtol=1e-12, atol=1e-14)

    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize("age, term", [(30, None), (65, None), (50, 15.0), (80, 7.5)])
    def test_continuous(self, assumption, age, term):
        cover = Cover("whole-life" if term is None else "endowment", term,
                      benefit_timing="moment-of-death")
        value, _ = insurance(models.susm(), [age], cover, 0.05, assumption)
        a = annuity(models.susm(), [age], Payments("continuous", 1, term), 0.05, assumption)
        assert_allclose(value, 1 - math.log(1.05) * a, rtol=1e-12)

    @pytest.mark.parametrize("on, amounts", [("first-death", (1.0, 0.0, 0.0)),
                                             ("second-death", (1.0, 1.0, 1.0))])
    def test_two_lives(self, on, amounts):
        for timing, payments in (("end-of-year", Payments()),
                                 ("moment-of-death", Payments("continuous"))):
            value, _ = insurance(models.susm(), [70, 66], Cover(benefit_timing=timing, on=on))
            a = annuity(models.susm(), [70, 66], payments, amounts=amounts)
            d = 0.05 / 1.05 if timing == "end-of-year" else math.log(1.05)
            assert_allclose(value, 1 - d * a, rtol=1e-12)


class TestRelations:
    @pytest.mark.parametrize("age, cover", [(40, Cover()), (60, Cover("term", 20.0)),
                                            (75, Cover("term", 5.0, 3.0))])
    def test_udd_moment_of_death_is_i_over_delta_times_end_of_year(self, age, cover):
        # Under UDD, A-bar = (i/delta) A for whole-life and term covers of whole years
        # (Bowers et al., Actuarial Mathematics, insurances under UDD).
        end_of_year, _ = insurance(models.susm(), [age], cover)
        at_death, _ = insurance(models.susm(), [age], Cover(
            cover.cover, cover.term, cover.deferral, benefit_timing="moment-of-death"))
        assert_allclose(at_death, 0.05 / math.log(1.05) * end_of_year, rtol=1e-12)

    @pytest.mark.parametrize("timing", ("end-of-year", "end-of-period", "moment-of-death"))
    def test_endowment_is_term_plus_pure_endowment(self, timing):
        # The definition of the endowment cover (common practice).
        parts = [insurance(models.susm(), [55], Cover(kind, 12.0, 2.0, 0.03, timing, 12))
                 for kind in ("endowment", "term", "pure-endowment")]
        assert_allclose(parts[0][0], parts[1][0] + parts[2][0], rtol=1e-13)

    def test_pure_endowment_is_discounted_survival(self):
        value, second = insurance(models.susm(), [60], Cover("pure-endowment", 10.0))
        survival = np.prod(1 - models.susm().q[40:50])
        assert_allclose(value, 1.05**-10 * survival, rtol=1e-13)
        assert_allclose(second, 1.05**-20 * survival, rtol=1e-13)

    def test_second_moment_is_the_value_at_double_the_force(self):
        # 2A_x: the same cover at interest (1 + i)^2 - 1 (Bowers et al., the rule of moments).
        _, second = insurance(models.susm(), [65])
        at_double, _ = insurance(models.susm(), [65], interest=1.05**2 - 1)
        assert_allclose(second, at_double, rtol=1e-13)

    def test_escalating_term_insurance_by_direct_sum(self):
        value, second = insurance(models.susm(), [50], Cover("term", 20.0, escalation=0.03))
        q = models.susm().q[30:50]
        alive = np.concatenate([[1.0], np.cumprod(1 - q)[:-1]])
        k = np.arange(20)
        # Definition: sum (1 + r)^k v^(k+1) kp q, and with everything squared at v^2.
        assert_allclose(value, np.sum(1.03**k * 1.05 ** -(k + 1) * alive * q), rtol=1e-13)
        assert_allclose(second, np.sum(1.03 ** (2 * k) * 1.05 ** (-2 * (k + 1)) * alive * q),
                        rtol=1e-13)


class TestMomentOfDeathAgainstQuadrature:
    """The integral of v^t t_p_x mu_(x+t), by scipy quad between whole ages."""

    @pytest.mark.parametrize("assumption", ("constant-force", "balducci", "udd"))
    @pytest.mark.parametrize("age, term", [(62.4, None), (88.7, 10.0)])
    @pytest.mark.parametrize("discount", ("flat", "spot", "segments"))
    def test_single_life(self, assumption, age, term, discount):
        spot = {"kind": "spot", "terms": [1, 5, 10, 30], "rates": [0.031, 0.036, 0.04, 0.042]}
        if discount == "flat":
            curve, nodes = Curve.flat(0.045), []

            def d(t):
                return 1.045**-t
        elif discount == "segments":
            # Each time at the rate of its band, an edge starting its band (the definition).
            edges, rates = [2.5, 7.0], [0.03, 0.05, 0.06]
            curve, nodes = Curve.from_mapping({"kind": "segments", "edges": edges,
                                               "rates": rates}), edges

            def d(t):
                return (1 + rates[sum(1 for e in edges if t >= e)]) ** -t
        else:
            curve, nodes = Curve.from_mapping(spot), spot["terms"]
            c = [math.log1p(r) for r in spot["rates"]]

            def d(t):
                return math.exp(-t * float(np.interp(t, spot["terms"], c)))
        table = models.susm()
        got = insurance_values([table], [Assurance((Life(age),), Cover(
            "whole-life" if term is None else "term", term, benefit_timing="moment-of-death"))],
            Valuation(curve, assumption)).value[0]
        life = DirectLife.of(table.q, table.first_age, age, assumption)
        end = life.horizon if term is None else term
        cuts = sorted({0.0, end, *life.integer_age_times(0, end), *[n for n in nodes
                                                                      if n < end]})
        expected = sum(integrate.quad(lambda t: d(t) * life.density(t), a, b, epsabs=1e-15,
                                      epsrel=1e-13, limit=200)[0]
                       for a, b in zip(cuts[:-1], cuts[1:], strict=True))
        # Point masses of death (q = 1 under constant force or Balducci), paid at once.
        expected += sum(d(t) * mass for t, mass in life.death_masses() if t < end)
        assert_allclose(got, expected, rtol=1e-10)


def test_impossible_covers_are_refused():
    with pytest.raises(ItemError) as caught:
        insurance_values([models.susm()], [Assurance((Life(60.0),), Cover("term")),
                                           Assurance((Life(60.0),), Cover(benefit_timing="x"))],
                         Valuation(0.05))
    assert set(caught.value.errors) == {"0.term", "1.benefit_timing"}
