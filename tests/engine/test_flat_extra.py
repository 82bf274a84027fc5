"""Flat extra mortality: an addition to q at every age, after the multiplier, capped at 1."""

import math

import pytest
from numpy.testing import assert_allclose

from service.engine.annuity import Item, Life, Payments, Valuation, annuity_values
from tests.reference import models
from tests.reference.direct import DirectLife, continuous_value, discrete_value


def direct(age, multiplier, extra, assumption):
    """The life's own chain of rates from the definition: min(multiplier q + extra, 1), the
    table's closing rate staying 1 (the stated convention)."""
    table = models.susm()
    start = math.floor(age)
    rates = [min(multiplier * q + extra, 1.0) if k < len(table.q) - 1 else 1.0
             for k, q in enumerate(table.q)][start - table.first_age:]
    return DirectLife(rates, age - start, assumption)


@pytest.mark.parametrize("assumption", ("udd", "constant-force", "balducci"))
@pytest.mark.parametrize("multiplier, extra", [(1.0, 0.005), (1.5, 0.01), (0.8, 0.2)])
@pytest.mark.parametrize("timing", ("advance", "continuous"))
def test_against_the_definition(assumption, multiplier, extra, timing):
    age = 62.3
    item = Item((Life(age, mortality_multiplier=multiplier, flat_extra=extra),),
                Payments(timing, 12 if timing == "advance" else 1, 30.0, 2.0, 5.0))
    got = annuity_values([models.susm()], [item], Valuation(0.04, assumption))[0]
    life = direct(age, multiplier, extra, assumption)
    options = {"term": 30.0, "deferral": 2.0, "guarantee": 5.0}
    expected = (discrete_value([life], 0.04, frequency=12, **options) if timing == "advance"
                else continuous_value([life], 0.04, **options))
    assert_allclose(got, expected, rtol=1e-10)


def test_no_extra_changes_nothing_and_more_extra_lowers_the_value():
    values = [annuity_values([models.susm()], [Item((Life(60.0, flat_extra=e),))],
                             Valuation(0.05))[0] for e in (0.0, 0.002, 0.01)]
    plain = annuity_values([models.susm()], [Item((Life(60.0),))], Valuation(0.05))[0]
    assert values[0] == plain
    assert values[0] > values[1] > values[2]
