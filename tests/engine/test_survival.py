"""Survival and force of mortality of individual lives."""

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose

from service.engine.survival import build_lives, fraction_force, fraction_survival
from tests.reference import models
from tests.reference.direct import DirectLife

ASSUMPTIONS = ("udd", "constant-force", "balducci")


class TestFractionSurvival:
    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize("q", (0.0, 0.01, 0.3, 0.999))
    def test_ends_of_the_year(self, assumption, q):
        assert_allclose(fraction_survival(q, 0.0, assumption), 1.0, rtol=0, atol=0)
        assert_allclose(fraction_survival(q, 1.0, assumption), 1 - q, rtol=1e-14, atol=1e-15)

    @pytest.mark.parametrize("r", (0.1, 0.5, 0.75))
    def test_defining_properties(self, r):
        q = 0.08
        # common practice: under UDD r_q_y = r q_y
        assert_allclose(1 - fraction_survival(q, r, "udd"), r * q, rtol=1e-14)
        # common practice: under a constant force r_p_y = p_y^r
        assert_allclose(fraction_survival(q, r, "constant-force"), (1 - q) ** r, rtol=1e-14)
        # common practice: under Balducci's assumption (1-r)_q_(y+r) = (1 - r) q_y
        rp = fraction_survival(q, r, "balducci")
        assert_allclose(1 - (1 - q) / rp, (1 - r) * q, rtol=1e-13)

    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    def test_force_is_minus_log_derivative(self, assumption):
        q, r, h = 0.2, 0.4, 1e-6
        slope = (math.log(fraction_survival(q, r + h, assumption))
                 - math.log(fraction_survival(q, r - h, assumption))) / (2 * h)
        assert_allclose(fraction_force(q, r, assumption), -slope, rtol=1e-8)


class TestLivesSurvival:
    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    def test_against_direct_chain(self, assumption):
        table = models.susm_select()
        cases = ((65.0, None, 1.0), (65.25, None, 1.0), (70.5, 0, 1.0), (70.5, 1, 2.0),
                 (104.9, None, 1.3), (129.5, None, 1.0), (44.0, 5, 3.0))
        lives, problems = build_lives([table], [0] * len(cases), [c[0] for c in cases],
                                      [math.inf if c[1] is None else c[1] for c in cases],
                                      [c[2] for c in cases], assumption)
        assert not problems
        times = np.linspace(0.0, 30.0, 241)
        for n, (age, duration, multiplier) in enumerate(cases):
            life = DirectLife.of(table.q, table.first_age, age, assumption,
                                 select_factors=models.SELECT_FACTORS, duration=duration,
                                 multiplier=multiplier)
            expected = [life.survival(t) for t in times]
            got = lives.survival(np.full(times.size, n), times)
            assert_allclose(got, expected, rtol=1e-13, atol=1e-300)

    def test_several_tables_in_one_batch(self):
        tables = [models.susm(), models.ilt()]
        lives, problems = build_lives(tables, [0, 1], [15.0 + 50, 15.0 + 50], [math.inf] * 2,
                                      [1.0, 1.0], "udd")
        assert not problems
        for n, table in enumerate(tables):
            life = DirectLife.of(table.q, table.first_age, 65.0, "udd")
            assert_allclose(lives.survival(n, 12.5), life.survival(12.5), rtol=1e-13)

    def test_problems_name_the_life(self):
        lives, problems = build_lives([models.susm()], [0, 0, 0], [19.5, 65.0, 131.0],
                                      [math.inf] * 3, [1.0] * 3, "udd")
        assert sorted(problems) == [0, 2]
        assert problems[0][0] == "age" and problems[2][0] == "age"


def _rates_only(table):
    """The same rates without the law, as a table read from a file would be."""
    from service.engine.tables import MortalityTable

    return MortalityTable.of(table.first_age, table.q)


class TestLivesForce:
    """The force of mortality that Woolhouse's third term uses."""

    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize("t", (0.0, 0.3, 2.75, 5.0, 10.5))
    def test_a_law_table_gives_the_law(self, assumption, t):
        # Makeham's law mu(y) = A + B c^y (the table's definition, published-values.md).
        lives, _ = build_lives([models.susm()], [0], [60.0], [math.inf], [1.0], assumption)
        a, b, c = models.SUSM["A"], models.SUSM["B"], models.SUSM["c"]
        assert_allclose(lives.force(0, t), a + b * c ** (60 + t), rtol=1e-13)

    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize("t", (0.3, 2.75, 10.5))
    def test_inside_a_year_the_assumption_gives_it(self, assumption, t):
        table = _rates_only(models.susm())
        lives, _ = build_lives([table], [0], [60.0], [math.inf], [1.0], assumption)
        q = table.q[math.floor(60 + t) - 20]
        r = t - math.floor(t)
        # The force of r p under each assumption (any life-contingencies text).
        expected = {"udd": q / (1 - r * q), "constant-force": -math.log1p(-q),
                    "balducci": q / (1 - (1 - r) * q)}[assumption]
        assert_allclose(lives.force(0, t), expected, rtol=1e-13)

    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize("t", (0.0, 1.0, 5.0))
    def test_at_a_whole_age_the_log_average(self, assumption, t):
        # mu(y) ~ -(ln p(y-1) + ln p(y)) / 2: Dickson, Hardy and Waters, AMLCR, Woolhouse's
        # formula (recalled from memory).
        table = _rates_only(models.susm())
        age = 60 + int(t)
        before, at = table.q[age - 1 - 20], table.q[age - 20]
        lives, _ = build_lives([table], [0], [60.0], [math.inf], [1.0], assumption)
        expected = -(math.log1p(-before) + math.log1p(-at)) / 2
        assert_allclose(lives.force(0, t), expected, rtol=1e-13)

    def test_a_multiplier_leaves_the_law_for_the_estimate(self):
        table = models.susm()
        lives, _ = build_lives([table], [0], [60.0], [math.inf], [1.5], "udd")
        before, at = 1.5 * table.q[59 - 20], 1.5 * table.q[60 - 20]
        assert_allclose(lives.force(0, 0.0), -(math.log1p(-before) + math.log1p(-at)) / 2,
                        rtol=1e-13)

    def test_select_years_use_their_own_rates(self):
        table = models.susm_select()
        lives, _ = build_lives([table], [0], [60.0], [0.0], [1.0], "udd")
        # No rate before selection: -ln p[60]; at 61 both select years; at 62 the ultimate
        # rate follows the second select year; from 63 the law again.
        q60, q61 = 0.81 * table.q[40], 0.9 * table.q[41]
        assert_allclose(lives.force(0, 0.0), -math.log1p(-q60), rtol=1e-13)
        assert_allclose(lives.force(0, 1.0), -(math.log1p(-q60) + math.log1p(-q61)) / 2,
                        rtol=1e-13)
        assert_allclose(lives.force(0, 2.0), -(math.log1p(-q61) + math.log1p(-table.q[42])) / 2,
                        rtol=1e-13)
        a, b, c = models.SUSM["A"], models.SUSM["B"], models.SUSM["c"]
        assert_allclose(lives.force(0, 3.0), a + b * c**63, rtol=1e-13)

    def test_the_first_age_and_the_closing_year(self):
        table = _rates_only(models.susm_short())
        lives, _ = build_lives([table], [0, 0], [20.0, 105.0], [math.inf] * 2, [1.0] * 2, "udd")
        assert_allclose(lives.force(0, 0.0), -math.log1p(-table.q[0]), rtol=1e-13)
        assert lives.force(1, 0.0) == math.inf


class TestAgesNearAWholeAge:
    def test_rounding_just_below_a_whole_age_keeps_the_select_year(self):
        # 64.02 - 0.02 is 63.99999999999999 in floating point: still a life aged 64, selected
        # now (common practice: an age is not moved by the last bit of its representation).
        from service.engine.annuity import Item, Life, Valuation, annuity_values
        from service.engine.tables import table_from_law

        table = table_from_law("makeham", {"A": 0.00022, "B": 2.7e-6, "c": 1.124}, 20,
                               select_factors=(0.81, 0.9))
        val = Valuation(0.05)
        exact = annuity_values([table], [Item((Life(64.0, duration=0),))], val)
        nudged = annuity_values([table], [Item((Life(64.02, duration=0,
                                                    age_adjustment=-0.02),))], val)
        assert abs(nudged[0] / exact[0] - 1) < 1e-12


@pytest.mark.parametrize("function", [fraction_survival, fraction_force])
def test_an_unknown_assumption_is_refused_by_name(function):
    # The three assumptions the service offers (common practice: UDD, constant force,
    # Balducci); any other name is refused, and the message lists the known ones.
    with pytest.raises(ValueError, match="'hyperbolic'.*udd, constant-force, balducci"):
        function(0.1, 0.5, "hyperbolic")
