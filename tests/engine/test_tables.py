"""Mortality tables generated from laws, and table validation."""

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose

from service.engine.errors import TableError
from service.engine.tables import MortalityTable, makeham_q, table_from_law, with_select_factors
from tests.reference import models
from tests.reference.direct import makeham_p


class TestTableFromLaw:
    @pytest.mark.parametrize(("law", "params", "first_age"), (
        ("makeham", models.SUSM, 20),
        ("makeham", models.ILT, 13),
        ("gompertz", {"B": 0.0003, "c": 1.07}, 0),
    ))
    def test_rates_follow_the_law_and_close_with_one(self, law, params, first_age):
        table = table_from_law(law, params, first_age)
        a = params.get("A", 0.0)
        ages = range(first_age, 130)
        expected = [1.0 - makeham_p(a, params["B"], params["c"], x) for x in ages]
        assert table.first_age == first_age
        assert table.last_age == 130
        assert_allclose(table.q[:-1], expected, rtol=1e-12, atol=1e-300)
        assert_allclose(table.q[-1], 1.0, rtol=0, atol=0)

    def test_last_age_can_be_chosen(self):
        table = table_from_law("makeham", models.SUSM, 20, last_age=105)
        assert table.last_age == 105
        assert table.q.size == 86
        assert_allclose(table.q[-1], 1.0, rtol=0, atol=0)
        assert_allclose(table.q[-2], 1.0 - makeham_p(0.00022, 2.7e-6, 1.124, 104), rtol=1e-13)

    def test_select_rates_are_factors_times_ultimate(self):
        table = models.susm_select()
        assert table.select_period == 2
        for j, x in enumerate(range(20, 60)):
            # q[x] = 0.81 q(x), q[x]+1 = 0.9 q(x+1): the definition of the select model
            assert_allclose(table.select_q[j], [0.81 * table.q[x - 20], 0.9 * table.q[x + 1 - 20]],
                            rtol=1e-15, atol=0)

    def test_select_rates_are_capped_at_one(self):
        table = with_select_factors(MortalityTable.of(50, [0.2, 0.6, 1.0]), (1.5, 2.0))
        # Every age is a selection age; the closing rate stays 1 (common practice).
        assert_allclose(table.select_q, [[0.3, 1.0], [0.9, 1.0], [1.0, 1.0]], rtol=1e-15, atol=0)

    @pytest.mark.parametrize(("law", "params"), (
        ("makeham", {"A": 0.001, "B": 0.0, "c": 1.1}),
        ("makeham", {"A": 0.001, "B": 1e-5, "c": 1.0}),
        ("makeham", {"A": -0.01, "B": 1e-6, "c": 1.1}),
        ("weibull", {"A": 0.001, "B": 1e-5, "c": 1.1}),
    ))
    def test_bad_laws_are_refused(self, law, params):
        with pytest.raises(TableError):
            table_from_law(law, params, 20)


class TestMakehamQ:
    def test_gompertz_is_makeham_without_a(self):
        ages = np.arange(30, 90)
        got = makeham_q(ages, 0.0, 0.0003, 1.07)
        expected = [-math.expm1(-0.0003 * 1.07**x * 0.07 / math.log(1.07)) for x in ages]
        assert_allclose(got, expected, rtol=1e-13, atol=0)


class TestMortalityTable:
    def test_must_close_with_one(self):
        with pytest.raises(TableError):
            MortalityTable.of(60, [0.1, 0.2, 0.9])

    @pytest.mark.parametrize("bad", (-0.1, 1.2, math.nan, math.inf))
    def test_rates_must_be_probabilities(self, bad):
        with pytest.raises(TableError):
            MortalityTable.of(60, [0.1, bad, 1.0])

    def test_rates_are_read_only(self):
        table = MortalityTable.of(60, [0.1, 0.2, 1.0])
        with pytest.raises(ValueError):
            table.q[0] = 0.5
