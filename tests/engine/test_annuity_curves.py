"""Annuity values and sensitivities under interest structures (flat, spot, segments, forward).

Every expected value is computed here from the rates themselves: discount factors by hand
from the structure's definition, survival from tests/reference/direct.py, and continuous
values by scipy quad.
"""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose

from service.engine.annuity import (
    Item,
    Life,
    Payments,
    Valuation,
    annuity_measures,
    annuity_values,
    cash_flow_schedule,
)
from service.engine.curves import Curve
from tests.reference import models
from tests.reference.direct import DirectLife, continuous_value, discrete_value

SPOT = {"kind": "spot", "terms": [1, 5, 10, 30], "rates": [0.031, 0.036, 0.04, 0.042]}
SEGMENTS = {"kind": "segments", "edges": [5, 20], "rates": [0.045, 0.052, 0.055]}
FORWARD = {"kind": "forward", "edges": [10], "rates": [0.05, 0.035]}
STRUCTURES = {"spot": SPOT, "segments": SEGMENTS, "forward": FORWARD}


def spot_discount(t):
    """exp(-t r(t)), r linear in ln(1 + rate) between terms, flat outside (the definition)."""
    c = [math.log1p(r) for r in SPOT["rates"]]
    return math.exp(-t * float(np.interp(t, SPOT["terms"], c)))


def segments_discount(t):
    """(1 + s)^-t with s the rate of the band t falls in (an edge starts its band)."""
    band = sum(1 for e in SEGMENTS["edges"] if t >= e)
    return (1 + SEGMENTS["rates"][band]) ** -t


def forward_discount(t):
    """The product over the bands of (1 + f)^-(years of [0, t] in the band)."""
    (edge,), (f1, f2) = FORWARD["edges"], FORWARD["rates"]
    return (1 + f1) ** -min(t, edge) * (1 + f2) ** -max(t - edge, 0)


BY_HAND = {"spot": spot_discount, "segments": segments_discount, "forward": forward_discount}

ITEMS = {
    "monthly advance whole life": Item((Life(62.5),), Payments("advance", 12)),
    "quarterly arrears deferred, term": Item((Life(48.0),), Payments("arrears", 4, 20.0, 7.0)),
    "annual with guarantee and escalation": Item(
        (Life(70.25),), Payments("advance", 1, None, 0.0, 10.0, 0.02)),
    "continuous deferred": Item((Life(55.75),), Payments("continuous", 1, 25.0, 3.5, 4.0)),
    "two lives two-thirds": Item((Life(66.0), Life(63.0)), Payments("advance", 12),
                                 (1.0, 1.0, 2 / 3)),
    "two lives continuous": Item((Life(66.0), Life(63.0)), Payments("continuous"),
                                 (1.0, 0.0, 0.0)),
}
ASSUMPTIONS = ("udd", "constant-force", "balducci")


def value(item, interest, assumption="udd", approximation="exact"):
    return annuity_values([models.susm()], [item],
                          Valuation(interest, assumption, approximation))[0]


def direct(item, discount, nodes, assumption):
    lives = [DirectLife.of(models.susm().q, 20, life.age, assumption) for life in item.lives]
    p = item.payments
    options = {"term": p.term, "deferral": p.deferral, "guarantee": p.guarantee,
               "escalation": p.escalation, "amounts": item.survivorship}
    if p.timing == "continuous":
        return continuous_value(lives, 0.0, discount=discount, nodes=nodes, **options)
    return discrete_value(lives, 0.0, frequency=p.frequency, timing=p.timing,
                          discount=discount, **options)


class TestOneRateIsTheFlatRate:
    @pytest.mark.parametrize("name", sorted(ITEMS))
    @pytest.mark.parametrize("assumption", ASSUMPTIONS)
    @pytest.mark.parametrize("structure", [
        {"kind": "flat", "rate": 0.043}, {"kind": "spot", "terms": [7], "rates": [0.043]},
        {"kind": "segments", "edges": [], "rates": [0.043]},
        {"kind": "forward", "edges": [], "rates": [0.043]},
        {"kind": "forward", "edges": [3, 12.5], "rates": [0.043] * 3},
        {"kind": "spot", "terms": [2, 9, 40], "rates": [0.043] * 3}])
    def test_equal(self, name, assumption, structure):
        item = ITEMS[name]
        flat = value(item, 0.043, assumption)
        assert_allclose(value(item, Curve.from_mapping(structure), assumption), flat,
                        rtol=1e-12)


class TestAgainstDiscountingByHand:
    @pytest.mark.parametrize("name", sorted(ITEMS))
    @pytest.mark.parametrize("kind", sorted(STRUCTURES))
    def test_udd(self, name, kind):
        item = ITEMS[name]
        curve = Curve.from_mapping(STRUCTURES[kind])
        nodes = STRUCTURES[kind].get("terms") or STRUCTURES[kind]["edges"]
        expected = direct(item, BY_HAND[kind], nodes, "udd")
        assert_allclose(value(item, curve), expected, rtol=1e-10)

    @pytest.mark.parametrize("assumption", ("constant-force", "balducci"))
    @pytest.mark.parametrize("name", ["continuous deferred", "two lives continuous",
                                      "monthly advance whole life"])
    def test_other_assumptions_on_the_spot_curve(self, assumption, name):
        item = ITEMS[name]
        expected = direct(item, spot_discount, SPOT["terms"], assumption)
        assert_allclose(value(item, Curve.from_mapping(SPOT), assumption), expected,
                        rtol=1e-10)

    def test_schedule_rows_carry_their_own_discount(self):
        item = ITEMS["quarterly arrears deferred, term"]
        curve = Curve.from_mapping(SEGMENTS)
        sched = cash_flow_schedule([models.susm()], item, Valuation(curve))
        assert_allclose(sched.discount, [segments_discount(t) for t in sched.time], rtol=1e-13)
        assert_allclose(sched.present_value.sum(), value(item, curve), rtol=1e-10)

    def test_woolhouse_year_across_a_segment_edge_is_summed_exactly(self):
        # A whole-life monthly annuity-due at 60.5 on segments with an edge at 5.5 years: the
        # year [5, 6) straddles it, so it is summed exactly, and the rest by Woolhouse.
        curve = Curve.from_mapping({"kind": "segments", "edges": [5.5], "rates": [0.03, 0.06]})
        item = Item((Life(60.5),), Payments("advance", 12))
        two = value(item, curve, approximation="woolhouse-2")
        exact = value(item, curve)
        assert abs(two / exact - 1) < 1e-3
        assert two > 0


def shifted(structure, y, node=None):
    """The structure with ln(1 + rate) raised by y (at one node only, if given)."""
    rates = [math.expm1(math.log1p(r) + (y if node in (None, k) else 0.0))
             for k, r in enumerate(structure.get("rates") or [structure["rate"]])]
    if structure["kind"] == "flat":
        return {"kind": "flat", "rate": rates[0]}
    return {**structure, "rates": rates}


class TestSensitivities:
    H = 2e-5

    @pytest.mark.parametrize("name", sorted(ITEMS))
    @pytest.mark.parametrize("kind", ["flat", *sorted(STRUCTURES)])
    def test_against_central_differences(self, name, kind):
        structure = STRUCTURES.get(kind, {"kind": "flat", "rate": 0.04})
        item = ITEMS[name]
        got = annuity_measures([models.susm()], [item],
                               Valuation(Curve.from_mapping(structure)))
        v = value(item, Curve.from_mapping(structure))
        assert_allclose(got.value[0], v, rtol=1e-10)

        def at(y, node=None):
            return value(item, Curve.from_mapping(shifted(structure, y, node)))

        up, down = at(self.H), at(-self.H)
        # -(1/V) dV/dy and (1/V) d2V/dy2 by central differences of the engine's own values.
        assert_allclose(got.duration[0], -(up - down) / (2 * self.H) / v, rtol=1e-6)
        assert_allclose(got.convexity[0], (up - 2 * v + down) / self.H**2 / v, rtol=1e-5)
        for k in range(len(structure.get("rates") or [0])):
            fd = -(at(self.H, k) - at(-self.H, k)) / (2 * self.H) / v
            assert_allclose(got.key_rate_durations[0, k], fd, rtol=1e-6, atol=1e-9)
        assert_allclose(got.key_rate_durations[0].sum(), got.duration[0], rtol=1e-12)

    @pytest.mark.parametrize("n", (1, 10, 25))
    @pytest.mark.parametrize("i", (0.01, 0.05, 0.12))
    def test_level_annuity_certain(self, n, i):
        # Macaulay duration of a level annuity-certain payable in arrears:
        # (1 + i)/i - n/((1 + i)^n - 1) (common practice; recalled from memory). A guarantee
        # as long as the term from now makes the payments certain.
        item = Item((Life(60.0),), Payments("arrears", 1, float(n), 0.0, float(n)))
        got = annuity_measures([models.susm()], [item], Valuation(i))
        assert_allclose(got.duration[0], (1 + i) / i - n / ((1 + i) ** n - 1), rtol=1e-12)
        # Convexity sum t^2 v^t / sum v^t, by hand.
        t = np.arange(1, n + 1)
        assert_allclose(got.convexity[0], np.sum(t * t * (1 + i) ** -t)
                        / np.sum((1 + i) ** -t), rtol=1e-12)


@st.composite
def curves(draw):
    kind = draw(st.sampled_from(("flat", "spot", "segments", "forward")))
    size = 1 if kind == "flat" else draw(st.integers(1, 6))
    rates = draw(st.lists(st.floats(-0.01, 0.12), min_size=size, max_size=size))
    if kind == "flat":
        return {"kind": "flat", "rate": rates[0]}
    knots = sorted(draw(st.lists(st.floats(0.5, 60.0), min_size=size, max_size=size,
                                 unique=True)))
    if kind == "spot":
        return {"kind": kind, "terms": knots, "rates": rates}
    return {"kind": kind, "edges": knots[1:], "rates": rates}


@settings(max_examples=40, deadline=None)
@given(curves(), st.sampled_from(sorted(ITEMS)), st.floats(0.001, 0.03))
def test_values_finite_positive_and_falling_as_rates_rise(structure, name, step):
    item = ITEMS[name]
    base = value(item, Curve.from_mapping(structure))
    higher = value(item, Curve.from_mapping(shifted(structure, step)))
    assert np.isfinite(base) and base > 0
    assert higher < base
