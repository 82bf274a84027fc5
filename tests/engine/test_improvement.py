"""Improvement scales and projected tables, against the definition

    F(a, y) = prod_{t=base}^{y-1} (1 - r(a, t))       (y >= base)
    F(a, y) = 1 / prod_{t=y}^{base-1} (1 - r(a, t))   (y <  base)

evaluated in the tests with plain Python loops over the calendar years."""

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose

from service.engine.errors import TableError
from service.engine.improvement import Scale, project_table
from service.engine.tables import MortalityTable, table_from_law, with_select_factors

ALL_AGES = np.arange(0, 131)
#: An invented small table, ages 60 to 65.
SMALL = MortalityTable.of(60, [0.010, 0.012, 0.020, 0.045, 0.300, 1.0])


def loop_factor(rate, age, year, base):
    """F(age, year) from the definition, one calendar year at a time."""
    if year >= base:
        f = 1.0
        for t in range(base, year):
            f *= 1.0 - rate(age, t)
        return f
    product = 1.0
    for t in range(year, base):
        product *= 1.0 - rate(age, t)
    return 1.0 / product


def loop_projection(table, rate, base, *, cohort=None, year=None):
    """The projected ultimate rates from the definition: q(a) F(a, c + a) or q(a) F(a, S),
    capped at 1; the closing rate stays 1."""
    out = []
    for k, q in enumerate(table.q):
        age = table.first_age + k
        if age == table.last_age:
            out.append(1.0)
            continue
        calendar = cohort + age if cohort is not None else year
        out.append(min(q * loop_factor(rate, age, calendar, base), 1.0))
    return out


def constant(rate, base=2020):
    return Scale.of(ALL_AGES, np.full(ALL_AGES.size, rate), base)


class TestZeroAndConstant:
    @pytest.mark.parametrize("how", ({"cohort": 1950}, {"year": 2040}, {"year": 1900}))
    def test_zero_improvement_changes_nothing(self, how):
        # Source: the definition; every factor is an empty product or 1 / a product of ones.
        table = with_select_factors(
            table_from_law("makeham", {"A": 0.0007, "B": 5e-5, "c": 1.09}, 20), (0.6, 0.8))
        projected = project_table(table, constant(0.0), **how)
        assert np.array_equal(projected.q, table.q)
        assert np.array_equal(projected.select_q, table.select_q)
        assert projected.select_first_age == table.select_first_age
        assert projected.law == table.law

    @pytest.mark.parametrize("r", (0.01, 0.025, -0.01))
    @pytest.mark.parametrize("cohort", (1930, 1958, 1975))
    def test_constant_rate_generational(self, r, cohort):
        # Closed form: with r everywhere, F(a, c + a) = (1 - r)^(c + a - base), for a
        # negative power as well (the division branch).
        projected = project_table(SMALL, constant(r), cohort=cohort)
        expected = [min(q * (1 - r) ** (cohort + 60 + k - 2020), 1.0)
                    for k, q in enumerate(SMALL.q[:-1])] + [1.0]
        assert_allclose(projected.q, expected, rtol=1e-12)
        assert projected.law is None

    @pytest.mark.parametrize("r", (0.01, -0.005))
    @pytest.mark.parametrize("year", (1990, 2020, 2051))
    def test_constant_rate_static(self, r, year):
        # Closed form: F(a, S) = (1 - r)^(S - base) at every age.
        projected = project_table(SMALL, constant(r), year=year)
        expected = [q * (1 - r) ** (year - 2020) for q in SMALL.q[:-1]] + [1.0]
        assert_allclose(projected.q, expected, rtol=1e-12)

    def test_static_projection_to_the_base_year_is_the_base_table(self):
        # Source: the definition (F(a, base) is the empty product 1).
        projected = project_table(SMALL, constant(0.02), year=2020)
        assert np.array_equal(projected.q, SMALL.q)


class TestTwoDimensional:
    AGES = np.arange(60, 66)
    YEARS = np.arange(2015, 2025)
    RATES = np.random.default_rng(7).uniform(-0.01, 0.04, (6, 10))
    LONG = 0.012

    def scale(self):
        return Scale.of(self.AGES, self.RATES, 2018, years=self.YEARS, long_term_rate=self.LONG)

    def rate(self, age, t):
        """r(a, t) read off the grid by hand: the first column before 2015, the long-term
        rate after 2024."""
        if t > 2024:
            return self.LONG
        return self.RATES[age - 60][max(t, 2015) - 2015]

    @pytest.mark.parametrize("cohort", (1940, 1955, 1960, 1970))
    def test_generational_against_the_loop(self, cohort):
        # Cohort 1955 is at 60 to 64 in 2015 to 2019 (before and after the base year 2018);
        # 1940 lies wholly before the grid, 1970 wholly past it (the long-term rate).
        projected = project_table(SMALL, self.scale(), cohort=cohort)
        expected = loop_projection(SMALL, self.rate, 2018, cohort=cohort)
        assert_allclose(projected.q, expected, rtol=1e-12)

    @pytest.mark.parametrize("year", (2000, 2016, 2018, 2024, 2025, 2060))
    def test_static_against_the_loop(self, year):
        projected = project_table(SMALL, self.scale(), year=year)
        expected = loop_projection(SMALL, self.rate, 2018, year=year)
        assert_allclose(projected.q, expected, rtol=1e-12)

    def test_rate_and_factor_broadcast(self):
        scale = self.scale()
        ages = np.array([[60], [63], [65]])
        years = np.array([2000, 2015, 2019, 2024, 2025, 2100])
        assert scale.rate(ages, years).shape == (3, 6)
        expected_r = [[self.rate(a, t) for t in years] for a in (60, 63, 65)]
        assert_allclose(scale.rate(ages, years), expected_r, rtol=0, atol=0)
        expected_f = [[loop_factor(self.rate, a, t, 2018) for t in years] for a in (60, 63, 65)]
        assert_allclose(scale.factor(ages, years), expected_f, rtol=1e-12)

    def test_years_past_the_last_column_use_the_long_term_rate(self):
        # By hand: F(a, 2030) = F(a, 2025) (1 - long)^5, the years 2025 to 2029 all past
        # the last column 2024.
        scale = self.scale()
        ratio = scale.factor(62, 2030) / scale.factor(62, 2025)
        assert_allclose(ratio, (1 - self.LONG) ** 5, rtol=1e-12)


class TestOneDimensionalLongTerm:
    AGE_RATES = [0.02, 0.018, 0.015, 0.012, 0.01, 0.008]

    @pytest.mark.parametrize("long_term_from, base, year", (
        (2025, 2020, 2030),   # five years at the age rates, five at the long-term rate
        (2025, 2020, 2023),   # before the switch
        (2025, 2020, 2010),   # before the base year: the age rates, divided
        (2015, 2020, 2010),   # switch before the base year: 2015 to 2019 at the long-term rate
        (2015, 2020, 2030),
    ))
    def test_against_the_loop(self, long_term_from, base, year):
        scale = Scale.of(np.arange(60, 66), self.AGE_RATES, base, long_term_rate=0.005,
                      long_term_from=long_term_from)

        def rate(age, t):
            return 0.005 if t >= long_term_from else self.AGE_RATES[age - 60]

        projected = project_table(SMALL, scale, year=year)
        assert_allclose(projected.q, loop_projection(SMALL, rate, base, year=year), rtol=1e-12)

    def test_hand_worked_factor(self):
        # Hand-worked: age 60, base 2020, switch in 2022, static year 2024:
        # F = (1 - 0.02)^2 (1 - 0.005)^2 = 0.9604 * 0.990025 = 0.95082001.
        scale = Scale.of(np.arange(60, 66), self.AGE_RATES, 2020, long_term_rate=0.005,
                      long_term_from=2022)
        assert_allclose(scale.factor(60, 2024), 0.95082001, rtol=1e-13)

    def test_without_long_term_from_the_age_rates_apply_every_year(self):
        scale = Scale.of(np.arange(60, 66), self.AGE_RATES, 2020, long_term_rate=0.5)
        assert_allclose(scale.factor(61, 2120), (1 - 0.018) ** 100, rtol=1e-12)


class TestCapsAndSelect:
    def test_rates_are_capped_at_one_and_the_table_still_closes(self):
        # Deterioration of 25% a year (r = -0.25): 0.3 * 1.25^10 > 1 is capped; by hand
        # 0.01 * 1.25^10 = 0.0931322574615479 stays below 1.
        scale = constant(-0.25)
        projected = project_table(SMALL, scale, year=2030)
        assert projected.q[4] == 1.0
        assert_allclose(projected.q[0], 0.0931322574615479, rtol=1e-12)
        assert projected.q[-1] == 1.0
        # Strong improvement leaves the closing rate at 1 too.
        assert project_table(SMALL, constant(0.5), year=2060).q[-1] == 1.0

    def test_select_rates_are_scaled_by_their_attained_age(self):
        select_q = [[0.004, 0.008, 0.015],
                    [0.005, 0.012, 0.030],
                    [0.009, 0.020, 0.200],
                    [0.015, 0.150, 1.0]]    # attained ages 63 to 65; 65 is the last age
        table = MortalityTable.of(60, SMALL.q, 60, select_q)
        age_rates = np.linspace(0.03, 0.005, 6)
        scale = Scale.of(np.arange(60, 66), age_rates, 2020)

        def rate(age, t):
            return age_rates[age - 60]

        cohort = 1958
        projected = project_table(table, scale, cohort=cohort)
        for j, row in enumerate(select_q):
            for s, q in enumerate(row):
                attained = 60 + j + s
                if attained == 65:
                    expected = q   # the closing age is left as it is
                else:
                    expected = min(q * loop_factor(rate, attained, cohort + attained, 2020), 1)
                assert_allclose(projected.select_q[j, s], expected, rtol=1e-12)
        assert_allclose(projected.q, loop_projection(table, rate, 2020, cohort=cohort),
                        rtol=1e-12)

    @pytest.mark.parametrize("ages", (np.arange(61, 131), np.arange(0, 65)))
    def test_a_scale_not_covering_the_table_is_refused(self, ages):
        scale = Scale.of(ages, np.full(ages.size, 0.01), 2020)
        with pytest.raises(TableError, match="covers ages"):
            project_table(SMALL, scale, cohort=1960)

    def test_more_improvement_gives_lower_rates(self):
        # Source: the definition; each factor is a product of (1 - r) decreasing in r.
        later = [project_table(SMALL, constant(r), cohort=1970).q for r in (0.0, 0.01, 0.03)]
        assert (later[1][:-1] < later[0][:-1]).all()
        assert (later[2][:-1] < later[1][:-1]).all()
        # Before the base year a higher rate means the past was worse: higher q.
        earlier = [project_table(SMALL, constant(r), year=1990).q for r in (0.0, 0.01, 0.03)]
        assert (earlier[1][:-1] > earlier[0][:-1]).all()
        assert (earlier[2][:-1] > earlier[1][:-1]).all()


class TestValidation:
    @pytest.mark.parametrize("kwargs, message", (
        ({"ages": [60, 61, 63], "rates": [0.01] * 3}, "consecutive"),
        ({"ages": [60.5, 61.5], "rates": [0.01] * 2}, "integers"),
        ({"ages": [], "rates": []}, "non-empty"),
        ({"ages": [60, 61], "rates": [0.01, 1.0]}, "below 1"),
        ({"ages": [60, 61], "rates": [0.01, math.nan]}, "finite"),
        ({"ages": [60, 61], "rates": [0.01, 0.02, 0.03]}, "3 rates for 2 ages"),
        ({"ages": [60, 61], "rates": [0.01] * 2, "long_term_rate": 1.5}, "below 1"),
        ({"ages": [60, 61], "rates": [0.01] * 2, "years": [2020]}, "years are only"),
        ({"ages": [60, 61], "rates": [[0.01, 0.02]] * 2}, "calendar years"),
        ({"ages": [60, 61], "rates": [[0.01, 0.02]] * 2, "years": [2020, 2021, 2022]},
         "shape"),
        ({"ages": [60, 61], "rates": [[0.01, 0.02]] * 2, "years": [2020, 2022]},
         "consecutive"),
        ({"ages": [60, 61], "rates": [[0.01, 0.02]] * 2, "years": [2020, 2021],
          "long_term_from": 2030}, "only for a scale by age"),
        ({"ages": [60, 61], "rates": [[[0.01]]] * 2}, "1-D"),
    ))
    def test_bad_scales_are_refused(self, kwargs, message):
        with pytest.raises(TableError, match=message):
            Scale.of(base_year=2020, **kwargs)

    def test_negative_rates_are_allowed(self):
        scale = Scale.of([60, 61], [-0.02, -0.5], 2020)
        assert_allclose(scale.factor(61, 2022), 1.5**2, rtol=1e-14)

    def test_years_outside_the_window_raise_value_error(self):
        scale = constant(0.01)
        scale.factor(50, [1820, 2320])                  # the window's own ends
        for year in (1819, 2321):
            with pytest.raises(ValueError, match="calendar years"):
                scale.factor(50, year)
        with pytest.raises(ValueError, match="calendar years"):
            project_table(SMALL, scale, cohort=2270)    # reaches 2330 at age 60

    def test_exactly_one_of_cohort_and_year(self):
        with pytest.raises(ValueError, match="exactly one"):
            project_table(SMALL, constant(0.01))
        with pytest.raises(ValueError, match="exactly one"):
            project_table(SMALL, constant(0.01), cohort=1960, year=2020)

    def test_arrays_are_frozen(self):
        scale = Scale.of([60, 61], [[0.01, 0.02]] * 2, 2020, years=[2020, 2021])
        for arr in (scale.ages, scale.rates, scale.years):
            with pytest.raises(ValueError):
                arr[0] = 0
