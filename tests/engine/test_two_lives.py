"""Annuities on two lives: joint life, last survivor, reversionary and partial survivorship."""

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
    value_annuities,
)
from service.engine.curves import Curve
from service.engine.tables import table_from_law
from tests.reference import models
from tests.reference.direct import DirectLife, continuous_value, discrete_value

ASSUMPTIONS = ("udd", "constant-force", "balducci")
JOINT = (1.0, 0.0, 0.0)
LAST_SURVIVOR = (1.0, 1.0, 1.0)
REVERSIONARY_TO_SECOND = (0.0, 0.0, 1.0)
ALL_TIMINGS = (
    Payments(),
    Payments(timing="arrears"),
    Payments(frequency=12),
    Payments(timing="arrears", frequency=4),
    Payments(timing="continuous"),
    Payments(frequency=2, term=15.0, deferral=3.5, escalation=0.02),
    Payments(timing="continuous", term=12.5, deferral=2.25, escalation=0.03),
)
ANNUAL_TIMINGS = (Payments(), Payments(timing="arrears"),
                  Payments(term=20.0, deferral=5.0, escalation=0.03))
GOLDEN = (1 + math.sqrt(5)) / 2


def values(tables, items, assumption, i=0.05):
    return annuity_values(tables, items, Valuation(i, assumption))


def timing_cases():
    """Every timing under a constant force; annual payments (integer times) under all three."""
    cases = [("constant-force", p) for p in ALL_TIMINGS]
    cases += [(a, p) for a in ("udd", "balducci") for p in ANNUAL_TIMINGS]
    return cases


class TestGompertzJointLife:
    """Gompertz lives x, y: the joint-life status survives like one life aged w,
    c^w = c^x + c^y (Bowers et al., multiple-life chapter)."""

    B, C = 5e-5, 1.1

    def exact_joint_survival(self, x, y, t):
        # Bowers et al., multiple-life chapter: t_p_xy = t_p_w with c^w = c^x + c^y
        w = math.log(self.C**x + self.C**y) / math.log(self.C)
        return math.exp(-self.B * self.C**w * (self.C**t - 1) / math.log(self.C))

    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize(("x", "y"), ((60, 55), (70, 70), (40, 85)))
    def test_survival_at_integer_times(self, assumption, x, y):
        table = table_from_law("gompertz", {"B": self.B, "c": self.C}, 0)
        item = Item((Life(float(x)), Life(float(y))), Payments(), JOINT)
        schedule = cash_flow_schedule([table], item, Valuation(0.05, assumption))
        # Integer times at which both lives are still inside the table's ages
        inside = schedule.time <= 129 - max(x, y)
        expected = [self.exact_joint_survival(x, y, t) for t in schedule.time[inside]]
        assert_allclose(schedule.both[inside], expected, rtol=1e-11, atol=1e-300)

    @pytest.mark.parametrize(("assumption", "payments"), timing_cases())
    @pytest.mark.parametrize("x", (50.0, 63.0))
    def test_equal_ages_with_c_a_root_of_two(self, assumption, payments, x):
        # With c = 2^(1/10), c^x + c^x = c^(x + 10): the joint life is one life aged x + 10.
        # Each year then has p(x+k)^2 = p(x+10+k) exactly, so under a constant force (and at
        # integer times under any assumption) the equality is exact. The table runs to 200
        # so that neither status can reach its end with a probability that matters.
        table = table_from_law("gompertz", {"B": 1e-4, "c": 2**0.1}, 0, last_age=200)
        joint = Item((Life(x), Life(x)), payments, JOINT)
        single = Item((Life(x + 10),), payments)
        got = values([table], [joint, single], assumption)
        assert_allclose(got[0], got[1], rtol=1e-11, atol=0)

    @pytest.mark.parametrize(("assumption", "payments"), timing_cases())
    @pytest.mark.parametrize("x", (45.0, 60.0))
    def test_ten_years_apart_with_c_a_root_of_the_golden_ratio(self, assumption, payments, x):
        # With c^10 = g (g^2 = g + 1): c^x + c^(x+10) = c^x (1 + g) = c^(x+20).
        table = table_from_law("gompertz", {"B": 3e-4, "c": GOLDEN**0.1}, 0, last_age=200)
        joint = Item((Life(x), Life(x + 10)), payments, JOINT)
        single = Item((Life(x + 20),), payments)
        got = values([table], [joint, single], assumption)
        assert_allclose(got[0], got[1], rtol=1e-11, atol=0)


class TestMakehamJointLife:
    """Makeham lives x, y: the joint life is two lives of equal age w, 2 c^w = c^x + c^y
    (Bowers et al., multiple-life chapter)."""

    @pytest.mark.parametrize(("assumption", "payments"), timing_cases())
    @pytest.mark.parametrize("x", (40.0, 55.0))
    def test_thirty_years_apart_with_c_a_root_of_the_golden_ratio(self, assumption, payments,
                                                                   x):
        # With c^10 = g: c^x + c^(x+30) = c^x (1 + g^3) = c^x 2 g^2 = 2 c^(x+20).
        table = table_from_law("makeham", {"A": 5e-4, "B": 3e-4, "c": GOLDEN**0.1}, 0,
                               last_age=200)
        unequal = Item((Life(x), Life(x + 30)), payments, JOINT)
        equal = Item((Life(x + 20), Life(x + 20)), payments, JOINT)
        got = values([table], [unequal, equal], assumption)
        assert_allclose(got[0], got[1], rtol=1e-11, atol=0)


def pair_items(x, y, payments, tables=(0, 0)):
    first, second = Life(x, table=tables[0]), Life(y, table=tables[1])
    return {
        "x": Item((first,), payments),
        "y": Item((second,), payments),
        "joint": Item((first, second), payments, JOINT),
        "last": Item((first, second), payments, LAST_SURVIVOR),
        "reversionary": Item((first, second), payments, REVERSIONARY_TO_SECOND),
        "two_thirds": Item((first, second), payments, (1.0, 2 / 3, 2 / 3)),
        "first_only": Item((first, second), payments, (0.0, 1.0, 0.0)),
    }


class TestSurvivorshipIdentities:
    """Identities between statuses (common practice), for payments without a guarantee."""

    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize("payments", ALL_TIMINGS)
    @pytest.mark.parametrize(("x", "y"), ((65.0, 62.0), (70.5, 81.25), (100.0, 30.0)))
    def test_identities(self, x, y, payments, assumption):
        items = pair_items(x, y, payments)
        a = dict(zip(items, values([models.susm()], list(items.values()), assumption),
                     strict=True))
        # common practice: a(x y-bar) = a(x) + a(y) - a(xy)
        assert_allclose(a["last"], a["x"] + a["y"] - a["joint"], rtol=1e-12, atol=1e-14)
        # common practice: a(x|y) = a(y) - a(xy)
        assert_allclose(a["reversionary"], a["y"] - a["joint"], rtol=1e-12, atol=1e-14)
        assert_allclose(a["first_only"], a["x"] - a["joint"], rtol=1e-12, atol=1e-14)
        # common practice: amounts are linear in the state probabilities
        expected = a["joint"] + 2 / 3 * (a["x"] - a["joint"]) + 2 / 3 * (a["y"] - a["joint"])
        assert_allclose(a["two_thirds"], expected, rtol=1e-12, atol=1e-14)

    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    def test_two_tables(self, assumption):
        items = pair_items(66.0, 61.5, Payments(frequency=12), tables=(0, 1))
        a = dict(zip(items, values([models.susm(), models.ilt()], list(items.values()),
                                   assumption), strict=True))
        # common practice: a(x y-bar) = a(x) + a(y) - a(xy)
        assert_allclose(a["last"], a["x"] + a["y"] - a["joint"], rtol=1e-12, atol=0)


class TestSecondLifeDeadAtOnce:
    """A second life with q = 1 adds nothing to a last-survivor annuity."""

    @pytest.mark.parametrize("payments", ALL_TIMINGS + (
        Payments(frequency=12, guarantee=5.0), Payments(deferral=2.0, guarantee=3.0),
        Payments(timing="continuous", deferral=1.5, guarantee=4.0)))
    @pytest.mark.parametrize("assumption", ("constant-force", "balducci"))
    @pytest.mark.parametrize("second", (Life(60.0, mortality_multiplier=1e6), Life(130.0)))
    def test_continuous_deaths_at_once(self, second, assumption, payments):
        # Under a constant force or Balducci, q = 1 means death straight after time 0.
        joint = Item((Life(67.25), second), payments, LAST_SURVIVOR)
        single = Item((Life(67.25),), payments)
        got = values([models.susm()], [joint, single], assumption)
        assert_allclose(got[0], got[1], rtol=1e-13, atol=0)

    @pytest.mark.parametrize("payments", ANNUAL_TIMINGS)
    @pytest.mark.parametrize("second", (Life(60.0, mortality_multiplier=1e6), Life(130.0)))
    def test_udd_annual(self, second, payments):
        # Under UDD a life with q = 1 may live part of the year, but not to its end.
        joint = Item((Life(67.0), second), payments, LAST_SURVIVOR)
        single = Item((Life(67.0),), payments)
        got = values([models.susm()], [joint, single], "udd")
        assert_allclose(got[0], got[1], rtol=1e-13, atol=0)


def direct_pair(x, y, assumption, tables=(models.susm, models.susm)):
    out = []
    for age, table_of in ((x, tables[0]), (y, tables[1])):
        table = table_of()
        out.append(DirectLife.of(table.q, table.first_age, age, assumption))
    return out


class TestTwoLivesAgainstDirectComputation:
    SHAPES = (  # (term, deferral, guarantee, escalation)
        (None, 0.0, 0.0, 0.0),
        (20.0, 0.0, 10.0, 0.0),
        (None, 2.5, 5.0, 0.02),
        (10.0, 1.0, 0.0, 0.0),
    )
    AMOUNTS = (JOINT, LAST_SURVIVOR, REVERSIONARY_TO_SECOND, (1.0, 0.6, 0.5))

    @pytest.mark.parametrize("amounts", AMOUNTS)
    @pytest.mark.parametrize("shape", SHAPES)
    @pytest.mark.parametrize(("timing", "m"), (("advance", 2), ("arrears", 12)))
    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    def test_discrete_sum(self, assumption, timing, m, shape, amounts):
        term, deferral, guarantee, escalation = shape
        item = Item((Life(70.25), Life(66.0, table=1)),
                    Payments(timing=timing, frequency=m, term=term, deferral=deferral,
                             guarantee=guarantee, escalation=escalation), amounts)
        got = values([models.susm(), models.ilt()], [item], assumption)[0]
        lives = direct_pair(70.25, 66.0, assumption, (models.susm, models.ilt))
        expected = discrete_value(lives, 0.05, frequency=m, timing=timing, term=term,
                                  deferral=deferral, guarantee=guarantee,
                                  escalation=escalation, amounts=amounts)
        assert_allclose(got, expected, rtol=1e-11, atol=0)

    @pytest.mark.parametrize("amounts", AMOUNTS)
    @pytest.mark.parametrize("shape", SHAPES)
    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize(("x", "y"), ((70.25, 62.5), (95.0, 96.0)))
    def test_continuous_integral(self, x, y, assumption, shape, amounts):
        term, deferral, guarantee, escalation = shape
        item = Item((Life(x), Life(y)),
                    Payments(timing="continuous", term=term, deferral=deferral,
                             guarantee=guarantee, escalation=escalation), amounts)
        got = values([models.susm_short()], [item], assumption)[0]
        lives = direct_pair(x, y, assumption, (models.susm_short, models.susm_short))
        expected = continuous_value(lives, 0.05, term=term, deferral=deferral,
                                    guarantee=guarantee, escalation=escalation, amounts=amounts)
        assert_allclose(got, expected, rtol=1e-9, atol=1e-15)

    def test_state_probabilities_add_up(self):
        item = Item((Life(70.25), Life(66.0)), Payments(frequency=4))
        schedule = cash_flow_schedule([models.susm()], item, Valuation(0.05, "balducci"))
        first, second = direct_pair(70.25, 66.0, "balducci")
        p1 = np.array([first.survival(t) for t in schedule.time])
        p2 = np.array([second.survival(t) for t in schedule.time])
        assert_allclose(schedule.both, p1 * p2, rtol=1e-12, atol=1e-300)
        assert_allclose(schedule.first_only, p1 * (1 - p2), rtol=1e-12, atol=1e-300)
        assert_allclose(schedule.second_only, (1 - p1) * p2, rtol=1e-12, atol=1e-300)


@pytest.mark.parametrize("approximation", ["exact", "woolhouse-3"])
@pytest.mark.parametrize("interest", [0.04, Curve.from_mapping(
    {"kind": "forward", "edges": [10], "rates": [0.03, 0.05]})])
def test_single_life_items_are_valued_alike_with_or_without_a_two_life_item_beside(
        interest, approximation):
    # A batch of single lives skips the second life's survival (its states are what the
    # general formulas give with it 0); next to a two-life item the same items take the
    # general formulas. Both give the same values and measures (general path).
    tables = [models.susm()]
    singles = [Item((Life(55.0 + 3.7 * k),),
                    Payments(("advance", "arrears", "continuous")[k % 3], (1, 4, 12)[k % 3],
                             term=None if k % 2 else 15.0, deferral=float(k % 4),
                             guarantee=5.0 if k % 5 == 0 else 0.0,
                             escalation=0.01 * (k % 3)))
               for k in range(12)]
    pair = Item((Life(60.0), Life(57.0)), Payments("advance", 12), (1.0, 0.0, 0.0))  # joint
    valuation = Valuation(interest, "udd", approximation)
    alone = value_annuities(tables, singles, valuation, fast=False,
                            measure=[True] * len(singles))
    beside = value_annuities(tables, singles + [pair], valuation, fast=False,
                             measure=[True] * (len(singles) + 1))
    assert_allclose(alone.value, beside.value[:-1], rtol=1e-15, atol=0)
    assert alone.method_code.tolist() == beside.method_code[:-1].tolist()
    for name in ("duration", "convexity"):
        assert_allclose(getattr(alone.measures, name), getattr(beside.measures, name)[:-1],
                        rtol=1e-14, atol=0)
