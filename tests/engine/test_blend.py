"""Blended tables, against blends computed here with plain loops from the definitions

    on q:        q(a) = sum_i w_i q_i(a)
    on survival: l(a) = sum_i w_i l_i(a), l_i(a) = prod_{b<a} (1 - q_i(b)),
                 q(a) = 1 - l(a+1) / l(a)   (1 where l(a) = 0 and at the last age)

on small invented tables."""

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose

from service.engine.errors import TableError
from service.engine.tables import MortalityTable, blend_tables, table_from_law

A = MortalityTable.of(70, [0.02, 0.05, 0.10, 0.30, 1.0])
B = MortalityTable.of(70, [0.01, 0.03, 0.07, 0.20, 1.0])
C = MortalityTable.of(70, [0.015, 0.04, 0.12, 0.25, 1.0])


def loop_lives(q):
    lives = [1.0]
    for rate in q:
        lives.append(lives[-1] * (1 - rate))
    return lives          # l at first .. last + 1


def loop_blend_q(tables, weights):
    return [sum(w * t.q[k] for t, w in zip(tables, weights, strict=True))
            for k in range(len(tables[0].q))]


def loop_blend_survival(tables, weights):
    lives = [loop_lives(t.q) for t in tables]
    blended = [sum(w * l_[k] for l_, w in zip(lives, weights, strict=True))
               for k in range(len(tables[0].q) + 1)]
    q = []
    for k in range(len(tables[0].q)):
        if k == len(tables[0].q) - 1 or blended[k] == 0:
            q.append(1.0)
        else:
            q.append(1 - blended[k + 1] / blended[k])
    return q


class TestOnQ:
    @pytest.mark.parametrize("tables, weights", (
        ((A, B), (0.3, 0.7)),
        ((A, B, C), (0.2, 0.5, 0.3)),
        ((A, B), (1.0, 0.0)),
    ))
    def test_against_the_loop(self, tables, weights):
        got = blend_tables(tables, weights, "q")
        assert_allclose(got.q, loop_blend_q(tables, weights), rtol=1e-14)
        assert got.first_age == 70 and got.last_age == 74
        assert got.select_period == 0 and got.law is None

    def test_hand_worked(self):
        # Hand-worked: 0.3 * 0.02 + 0.7 * 0.01 = 0.013; 0.3 * 0.30 + 0.7 * 0.20 = 0.23.
        got = blend_tables((A, B), (0.3, 0.7), "q")
        assert_allclose(got.q[[0, 3]], [0.013, 0.23], rtol=1e-14)
        assert got.q[-1] == 1.0

    def test_select_rates_are_blended_elementwise(self):
        sa = MortalityTable.of(70, A.q, 71, [[0.01, 0.04], [0.05, 0.2], [0.1, 1.0]])
        sb = MortalityTable.of(70, B.q, 71, [[0.02, 0.02], [0.03, 0.1], [0.05, 1.0]])
        got = blend_tables((sa, sb), (0.25, 0.75), "q")
        assert got.select_first_age == 71 and got.select_q.shape == (3, 2)
        expected = [[0.25 * sa.select_q[j, s] + 0.75 * sb.select_q[j, s] for s in range(2)]
                    for j in range(3)]
        assert_allclose(got.select_q, expected, rtol=1e-14)
        assert got.select_q[2, 1] == 1.0
        assert_allclose(got.q, loop_blend_q((sa, sb), (0.25, 0.75)), rtol=1e-14)

    @pytest.mark.parametrize("other", (
        MortalityTable.of(70, B.q, 70, [[0.02, 0.02], [0.03, 0.1], [0.05, 0.2]]),  # other start
        MortalityTable.of(70, B.q, 71, [[0.02], [0.03], [0.05]]),                 # other period
        B,                                                                      # not select
    ))
    def test_different_select_structures_are_refused(self, other):
        sa = MortalityTable.of(70, A.q, 71, [[0.01, 0.04], [0.05, 0.2], [0.1, 1.0]])
        with pytest.raises(TableError, match="same select structure"):
            blend_tables((sa, other), (0.5, 0.5), "q")

    def test_a_blend_of_laws_has_no_law(self):
        one = table_from_law("gompertz", {"B": 0.0003, "c": 1.07}, 60)
        two = table_from_law("gompertz", {"B": 0.0002, "c": 1.08}, 60)
        assert blend_tables((one, two), (0.5, 0.5), "q").law is None


class TestOnSurvival:
    @pytest.mark.parametrize("tables, weights", (
        ((A, B), (0.3, 0.7)),
        ((A, B, C), (0.2, 0.5, 0.3)),
        ((A, B), (0.0, 1.0)),
    ))
    def test_against_the_loop(self, tables, weights):
        got = blend_tables(tables, weights, "survival")
        assert_allclose(got.q, loop_blend_survival(tables, weights), rtol=1e-13)
        assert got.law is None

    def test_the_blended_rates_reproduce_the_blended_survivors(self):
        # Follows from the definition: prod_{b<a} (1 - q(b)) telescopes to l(a) / l(first),
        # and l(first) = sum_i w_i = 1.
        weights = (0.2, 0.5, 0.3)
        got = blend_tables((A, B, C), weights, "survival")
        survivors = np.cumprod(np.append(1.0, 1.0 - got.q[:-1]))
        expected = [sum(w * loop_lives(t.q)[k] for t, w in zip((A, B, C), weights, strict=True))
                    for k in range(5)]
        assert_allclose(survivors, expected, rtol=1e-13)

    def test_hand_worked_second_year(self):
        # Hand-worked, weights 1/2 each: l(71) = (0.98 + 0.99) / 2 = 0.985;
        # l(72) = (0.98 * 0.95 + 0.99 * 0.97) / 2 = (0.931 + 0.9603) / 2 = 0.94565;
        # q(71) = 1 - 0.94565 / 0.985 = 0.03994923857868...
        got = blend_tables((A, B), (0.5, 0.5), "survival")
        assert_allclose(got.q[1], 1 - 0.94565 / 0.985, rtol=1e-13)
        # It differs from the blend on q (0.04): the survival blend leans on the healthier
        # table as lives die out.
        assert got.q[1] < 0.04

    def test_no_survivors_gives_rate_one(self):
        # Both tables close early at 71: l(72) = 0 and q = 1 from there on, by definition.
        d = MortalityTable.of(70, [0.1, 1.0, 0.5, 0.5, 1.0])
        e = MortalityTable.of(70, [0.2, 1.0, 0.3, 0.4, 1.0])
        got = blend_tables((d, e), (0.4, 0.6), "survival")
        assert_allclose(got.q, loop_blend_survival((d, e), (0.4, 0.6)), rtol=1e-14)
        assert list(got.q[1:]) == [1.0, 1.0, 1.0, 1.0]

    def test_select_tables_are_refused(self):
        sa = MortalityTable.of(70, A.q, 71, [[0.01, 0.04], [0.05, 0.2], [0.1, 1.0]])
        with pytest.raises(TableError, match="survival"):
            blend_tables((sa, B), (0.5, 0.5), "survival")


class TestRefusals:
    @pytest.mark.parametrize("weights, message", (
        ((0.5, 0.4), "sum to 1"),
        ((0.5, 0.5 + 1e-9), "sum to 1"),
        ((1.2, -0.2), "non-negative"),
        ((math.nan, 1.0), "finite"),
        ((math.inf, 0.0), "finite"),
        ((1.0,), "1 weights for 2 tables"),
    ))
    @pytest.mark.parametrize("on", ("q", "survival"))
    def test_bad_weights(self, weights, message, on):
        with pytest.raises(TableError, match=message):
            blend_tables((A, B), weights, on)

    def test_weights_within_1e_12_are_accepted(self):
        got = blend_tables((A, B), (0.5, 0.5 + 5e-13), "q")
        assert got.q[-1] == 1.0

    @pytest.mark.parametrize("other", (
        MortalityTable.of(71, [0.03, 0.07, 0.20, 1.0]),          # other first age
        MortalityTable.of(70, [0.01, 0.03, 0.07, 0.20, 0.5, 1.0]),  # other last age
    ))
    @pytest.mark.parametrize("on", ("q", "survival"))
    def test_mismatched_ages(self, other, on):
        with pytest.raises(TableError, match="first and last ages"):
            blend_tables((A, other), (0.5, 0.5), on)

    def test_no_tables_and_unknown_method(self):
        with pytest.raises(TableError, match="at least one"):
            blend_tables((), (), "q")
        with pytest.raises(ValueError, match="unknown blend method"):
            blend_tables((A, B), (0.5, 0.5), "force")
