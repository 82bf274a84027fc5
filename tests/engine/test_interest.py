"""Interest conversions and annuities certain."""

import math

import numpy_financial as npf
import pytest
from numpy.testing import assert_allclose

from service.engine import interest


class TestNominalRates:
    @pytest.mark.parametrize("i", (0.0001, 0.03, 0.06, 0.25, -0.02))
    @pytest.mark.parametrize("m", (1, 2, 4, 12, 365))
    def test_accumulate_to_the_effective_rate(self, i, m):
        # common practice: (1 + i^(m)/m)^m = 1 + i = (1 - d^(m)/m)^(-m)
        assert_allclose((1 + interest.nominal_interest(i, m) / m) ** m, 1 + i, rtol=1e-13)
        assert_allclose((1 - interest.nominal_discount(i, m) / m) ** -m, 1 + i, rtol=1e-13)

    def test_tiny_rates_keep_precision(self):
        # common practice: i^(m) ~ i - (m - 1) i^2 / (2m) for small i
        i = 1e-9
        assert_allclose(interest.nominal_interest(i, 12), i - 11 * i * i / 24, rtol=1e-15)


class TestForceAndDiscount:
    @pytest.mark.parametrize("i", (0.0, 0.05, -0.5))
    def test_definitions(self, i):
        assert_allclose(interest.force_of_interest(i), math.log(1 + i), rtol=1e-15, atol=0)
        assert_allclose(interest.discount_factor(i, 7.5), (1 + i) ** -7.5, rtol=1e-14)


class TestAnnuityCertain:
    @pytest.mark.parametrize("advance", (True, False))
    @pytest.mark.parametrize(("i", "n", "m"), ((0.05, 10, 1), (0.05, 10.5, 2), (0.06, 25, 12),
                                               (0.03, 0.25, 4), (-0.01, 5, 1)))
    def test_against_numpy_financial(self, i, n, m, advance):
        got = interest.annuity_certain(i, n, m=m, advance=advance)
        # numpy-financial pv of n m payments of 1/m
        expected = npf.pv((1 + i) ** (1 / m) - 1, round(n * m), -1 / m, 0.0,
                          when="begin" if advance else "end")
        assert_allclose(got, expected, rtol=1e-12, atol=0)

    @pytest.mark.parametrize("advance", (True, False))
    def test_zero_interest_is_the_term(self, advance):
        assert_allclose(interest.annuity_certain(0.0, 7.25, m=4, advance=advance), 7.25,
                        rtol=1e-15, atol=0)
