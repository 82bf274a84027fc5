"""Interest structures: discounting, validation, audit, exact continuous pieces, sensitivities.

Every check compares with something computed here from the rates by hand (the definitions of
the four structures), a textbook closed form, scipy or mpmath, or finite differences.
"""

import dataclasses
import hashlib
import json
import math

import mpmath
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose
from scipy import integrate

from service.engine import integrals
from service.engine.curves import MAX_POINTS, RULE_REACH, Curve, CurveError
from service.engine.errors import EngineError
from tests import strategies

SPOT = {"kind": "spot", "terms": [1, 5, 10, 30], "rates": [0.031, 0.036, 0.04, 0.042]}
SEGMENTS = {"kind": "segments", "edges": [5, 20], "rates": [0.045, 0.052, 0.055]}
FORWARD = {"kind": "forward", "edges": [10], "rates": [0.05, 0.035]}
FLAT = {"kind": "flat", "rate": 0.04}
EXAMPLES = (FLAT, SPOT, SEGMENTS, FORWARD)
#: A spot curve that moves steeply: ln(1 + r) rises from ln 0.5 to ln 4 within one year.
STEEP = {"kind": "spot", "terms": [0.5, 1.5, 2.0], "rates": [-0.5, 3.0, 0.01]}

#: Monthly payments for 40 years in arrears, amounts falling like a survival curve.
TIMES = np.arange(1, 481) / 12.0
AMOUNTS = 0.98 ** TIMES * (1.0 - TIMES / 90.0)


def curve(mapping) -> Curve:
    return Curve.from_mapping(mapping)


def shifted(mapping, shifts):
    """The same structure with ln(1 + rate) of each factor raised by ``shifts`` (in the test:
    rate' = (1 + rate) e^shift - 1)."""
    if mapping["kind"] == "flat":
        return {**mapping, "rate": (1 + mapping["rate"]) * math.exp(shifts[0]) - 1}
    rates = [(1 + r) * math.exp(s) - 1 for r, s in zip(mapping["rates"], shifts, strict=True)]
    return {**mapping, "rates": rates}


def value(mapping, times=TIMES, amounts=AMOUNTS):
    return float(np.sum(amounts * curve(mapping).discount(times)))


# ---------------------------------------------------------------------------------------------


class TestFromMapping:
    @pytest.mark.parametrize(("mapping", "described"), (
        (FLAT, {"kind": "flat", "rate": 0.04}),
        (SPOT, {"kind": "spot", "terms": [1.0, 5.0, 10.0, 30.0],
                "rates": [0.031, 0.036, 0.04, 0.042]}),
        (SEGMENTS, {"kind": "segments", "edges": [5.0, 20.0], "rates": [0.045, 0.052, 0.055]}),
        (FORWARD, {"kind": "forward", "edges": [10.0], "rates": [0.05, 0.035]}),
    ))
    def test_describe_gives_back_the_structure(self, mapping, described):
        c = curve(mapping)
        assert c.describe() == described
        assert all(isinstance(x, float) for v in c.describe().values() if isinstance(v, list)
                   for x in v)
        assert Curve.from_mapping(c.describe()) == c

    def test_flat_shortcut(self):
        assert Curve.flat(0.04) == curve(FLAT)
        assert hash(Curve.flat(0.04)) == hash(curve(FLAT))

    def test_two_hundred_points_are_accepted(self):
        terms = list(range(1, MAX_POINTS + 1))
        c = curve({"kind": "spot", "terms": terms, "rates": [0.03] * MAX_POINTS})
        assert c.size == MAX_POINTS

    @pytest.mark.parametrize(("mapping", "path", "words"), (
        ({"kind": "spot", "terms": [1, 5, 5], "rates": [0.03, 0.04, 0.05]},
         "interest.terms.2", "greater"),
        ({"kind": "spot", "terms": [1, 5, 3], "rates": [0.03, 0.04, 0.05]},
         "interest.terms.2", "greater"),
        ({"kind": "segments", "edges": [5, 20], "rates": [0.03, 0.04, -1.0]},
         "interest.rates.2", "above -1"),
        ({"kind": "segments", "edges": [5, 20], "rates": [0.03, 0.04]},
         "interest.rates", "one more rate than edges"),
        ({"kind": "forward", "edges": [], "rates": [0.03, 0.04]},
         "interest.rates", "one more rate than edges"),
        ({"kind": "spot", "terms": [1, 2], "rates": [0.03]}, "interest.rates", "one rate per"),
        ({"kind": "spot", "terms": [], "rates": []}, "interest.terms", "at least one"),
        ({"kind": "spot", "terms": list(range(1, 202)), "rates": [0.03] * 201},
         "interest.rates", "at most 200"),
        ({"kind": "forward", "edges": list(range(1, 201)), "rates": [0.03] * 201},
         "interest.rates", "at most 200"),
        ({"kind": "curve", "rate": 0.03}, "interest.kind", "one of"),
        ({"rate": 0.03}, "interest.kind", "one of"),
        ({"kind": "spot", "terms": [1]}, "interest.rates", "required"),
        ({"kind": "spot", "terms": [1], "rates": [0.03], "rate": 0.03}, "interest.rate",
         "unknown field"),
        ({"kind": "spot", "terms": [1], "rates": ["0.03"]}, "interest.rates.0", "number"),
        ({"kind": "spot", "terms": [1], "rates": 0.03}, "interest.rates", "list"),
        ({"kind": "flat", "rate": True}, "interest.rate", "number"),
        ({"kind": "flat", "rate": -1.5}, "interest.rate", "above -1"),
        ({"kind": "flat", "rate": math.nan}, "interest.rate", "finite"),
        ({"kind": "segments", "edges": [5, math.inf], "rates": [0.03] * 3},
         "interest.edges.1", "finite"),
        ({"kind": "segments", "edges": [0, 5], "rates": [0.03] * 3}, "interest.edges.0",
         "positive"),
        ({"kind": "spot", "terms": [-1, 5], "rates": [0.03] * 2}, "interest.terms.0", "positive"),
        ([0.03], "interest", "object"),
    ))
    def test_refusals_name_the_field(self, mapping, path, words):
        with pytest.raises(CurveError) as caught:
            Curve.from_mapping(mapping)
        assert path in caught.value.errors
        assert any(words in m for m in caught.value.errors[path])
        assert isinstance(caught.value, EngineError)

    def test_every_problem_is_reported_under_the_callers_path(self):
        with pytest.raises(CurveError) as caught:
            Curve.from_mapping({"kind": "segments", "edges": [5, 4], "rates": [0.03, -2, 0.04]},
                               path="items.3.interest")
        assert set(caught.value.errors) == {"items.3.interest.edges.1",
                                            "items.3.interest.rates.1"}

    def test_the_constructor_validates_too(self):
        with pytest.raises(CurveError):
            Curve("spot", (5.0, 1.0), (0.03, 0.04))
        with pytest.raises(CurveError):
            Curve("flat", (1.0,), (0.03,))

    def test_it_is_built_whole_from_floats(self):
        # Frozen and never patched after construction: whole numbers from a mapping become
        # floats before the constructor sees them, so "5" and "5.0" name the same structure.
        from_ints = Curve.from_mapping({"kind": "spot", "terms": [1, 5], "rates": [0.03, 0.04]})
        from_floats = Curve.from_mapping({"kind": "spot", "terms": [1.0, 5.0],
                                          "rates": [0.03, 0.04]})
        assert from_ints == from_floats and from_ints.digest() == from_floats.digest()
        assert all(type(x) is float for x in from_ints.knots)
        assert Curve.flat(0).rates == (0.0,)
        with pytest.raises(TypeError):
            Curve("spot", (1, 5), (0.03, 0.04))
        with pytest.raises(dataclasses.FrozenInstanceError):
            from_floats.rates = (0.05, 0.05)


class TestDigest:
    @pytest.mark.parametrize("mapping", EXAMPLES)
    def test_sha256_of_the_canonical_json(self, mapping):
        # The definition: SHA-256 of the audit dict as JSON with sorted keys and no spaces.
        text = json.dumps(curve(mapping).describe(), sort_keys=True, separators=(",", ":"))
        assert curve(mapping).digest() == "sha256:" + hashlib.sha256(text.encode()).hexdigest()

    def test_same_curve_same_digest_and_any_change_shows(self):
        as_ints = {"kind": "segments", "edges": [5, 20], "rates": [0.045, 0.052, 0.055]}
        as_floats = {"kind": "segments", "edges": [5.0, 20.0], "rates": [0.045, 0.052, 0.055]}
        assert curve(as_ints).digest() == curve(as_floats).digest()
        digests = {curve(m).digest() for m in (
            as_ints, {**as_ints, "rates": [0.045, 0.052, 0.0550001]},
            {**as_ints, "kind": "forward"}, {**as_ints, "edges": [5, 21]})}
        assert len(digests) == 4


class TestFactorsAndMethod:
    def test_factors_name_each_key_rate(self):
        assert curve(SPOT).factors() == ({"term": 1.0}, {"term": 5.0}, {"term": 10.0},
                                         {"term": 30.0})
        assert curve(SEGMENTS).factors() == ({"from": 0.0, "to": 5.0},
                                             {"from": 5.0, "to": 20.0},
                                             {"from": 20.0, "to": None})
        assert curve(FLAT).factors() == ({"from": 0.0, "to": None},)

    def test_method_says_how_a_curved_structure_is_integrated(self):
        assert "Gauss-Legendre" in curve(SPOT).method()["continuous"]
        for mapping in (FLAT, SEGMENTS, FORWARD, {"kind": "spot", "terms": [1, 2],
                                                  "rates": [0.03, 0.03]}):
            assert "Gauss-Legendre" not in curve(mapping).method()["continuous"]
        assert "band edges" in curve(SEGMENTS).method()["continuous"]


class TestFlatEquivalents:
    """A flat rate, a one-term spot curve, one segment and one forward band are the same."""

    RATE = 0.04
    ONE_EACH = (
        {"kind": "flat", "rate": RATE},
        {"kind": "spot", "terms": [7.0], "rates": [RATE]},
        {"kind": "segments", "edges": [], "rates": [RATE]},
        {"kind": "forward", "edges": [], "rates": [RATE]},
        {"kind": "spot", "terms": [1, 3, 9], "rates": [RATE] * 3},
        {"kind": "segments", "edges": [2, 5], "rates": [RATE] * 3},
        {"kind": "forward", "edges": [2, 5], "rates": [RATE] * 3},
    )
    T = np.array([0.0, 1e-9, 0.25, 1.0, 2.0, 5.0, 7.0, 9.5, 40.0, 120.0])

    @pytest.mark.parametrize("mapping", ONE_EACH)
    def test_discount_is_v_to_the_t(self, mapping):
        # common practice: v^t = (1 + i)^-t
        assert_allclose(curve(mapping).discount(self.T), (1 + self.RATE) ** -self.T,
                        rtol=1e-12, atol=0)
        assert curve(mapping).constant_force == pytest.approx(math.log(1 + self.RATE), 1e-15)
        assert not curve(mapping).curved

    @pytest.mark.parametrize("mapping", ONE_EACH)
    def test_pieces_are_the_constant_force(self, mapping):
        c = curve(mapping)
        pc = c.pieces(np.array([0.0, 2.0, 5.5]), np.array([1.0, 1.0, 0.5]))
        assert_allclose(pc.force, math.log(1 + self.RATE), rtol=1e-12)
        assert_allclose(pc.factor, (1 + self.RATE) ** -np.array([0.0, 2.0, 5.5]), rtol=1e-12)
        assert_allclose(pc.curvature, 0.0, atol=0)

    @pytest.mark.parametrize("mapping", ONE_EACH)
    def test_duration_is_the_flat_one(self, mapping):
        v = (1 + self.RATE) ** -TIMES
        pv = AMOUNTS * v
        got = curve(mapping).moments(np.zeros(TIMES.size, dtype=int), TIMES,
                                     AMOUNTS * curve(mapping).discount(TIMES), 1).measures()
        assert_allclose(got.value, pv.sum(), rtol=1e-12)
        assert_allclose(got.duration, np.sum(TIMES * pv) / pv.sum(), rtol=1e-12)
        assert_allclose(got.convexity, np.sum(TIMES**2 * pv) / pv.sum(), rtol=1e-12)


class TestSpotDiscount:
    """Against the definition worked by hand: c = ln(1 + s), r linear in t between terms."""

    c = [math.log(1.031), math.log(1.036), math.log(1.04), math.log(1.042)]

    @pytest.mark.parametrize(("t", "expected"), (
        (0.0, 1.0),
        (0.5, 1.031 ** -0.5),  # flat before the first term
        (1.0, 1.031 ** -1),
        (3.0, math.exp(-3 * (c[0] + (c[1] - c[0]) * (3 - 1) / (5 - 1)))),
        (5.0, 1.036 ** -5),
        (7.5, math.exp(-7.5 * (c[1] + (c[2] - c[1]) * 2.5 / 5))),
        (20.0, math.exp(-20 * (c[2] + (c[3] - c[2]) * 10 / 20))),
        (30.0, 1.042 ** -30),
        (45.0, 1.042 ** -45),  # flat beyond the last term
    ))
    def test_by_hand(self, t, expected):
        assert_allclose(curve(SPOT).discount(t), expected, rtol=1e-13, atol=0)
        assert_allclose(curve(SPOT).discount(np.array([t, t])), [expected] * 2, rtol=1e-13)

    def test_continuous_at_the_terms(self):
        c = curve(SPOT)
        for term in (1.0, 5.0, 10.0, 30.0):
            assert_allclose(c.discount(term - 1e-12), c.discount(term + 1e-12), rtol=1e-10)

    def test_forward_force_is_the_derivative_of_the_log_discount(self):
        c = curve(SPOT)
        t = np.array([0.5, 2.0, 4.0, 6.0, 12.0, 29.0, 31.0])
        h = 1e-6
        slope = (c.log_discount(t + h) - c.log_discount(t - h)) / (2 * h)
        assert_allclose(c.forward_force(t), slope, rtol=1e-7)


class TestSegmentsDiscount:
    @pytest.mark.parametrize(("t", "expected"), (
        (0.0, 1.0),
        (3.0, 1.045 ** -3),
        (4.999, 1.045 ** -4.999),
        (5.0, 1.052 ** -5),  # a time on an edge belongs to the band that starts there
        (19.5, 1.052 ** -19.5),
        (20.0, 1.055 ** -20),
        (65.25, 1.055 ** -65.25),
    ))
    def test_each_time_at_its_band_rate(self, t, expected):
        # by hand: (1 + s_band)^-t, the way segment rates are applied to each payment
        assert_allclose(curve(SEGMENTS).discount(t), expected, rtol=1e-13, atol=0)


class TestForwardDiscount:
    @pytest.mark.parametrize(("t", "expected"), (
        (4.0, 1.05 ** -4),
        (10.0, 1.05 ** -10),
        (17.0, 1.05 ** -10 * 1.035 ** -7),
        (40.5, 1.05 ** -10 * 1.035 ** -30.5),
    ))
    def test_compounded_product(self, t, expected):
        assert_allclose(curve(FORWARD).discount(t), expected, rtol=1e-13, atol=0)

    def test_three_bands(self):
        c = curve({"kind": "forward", "edges": [5, 20], "rates": [0.045, 0.052, 0.055]})
        assert_allclose(c.discount(30.0), 1.045 ** -5 * 1.052 ** -15 * 1.055 ** -10, rtol=1e-13)
        assert_allclose(c.discount(12.0), 1.045 ** -5 * 1.052 ** -7, rtol=1e-13)


class TestNodesAndPieces:
    def test_nodes(self):
        assert_allclose(curve(SPOT).nodes(), [1, 5, 10, 30])
        assert_allclose(curve(SEGMENTS).nodes(), [5, 20])
        assert_allclose(curve(FORWARD).nodes(), [10])
        assert curve(FLAT).nodes().size == 0
        assert curve({"kind": "spot", "terms": [3], "rates": [0.03]}).nodes().size == 0

    @pytest.mark.parametrize("mapping", (*EXAMPLES, STEEP))
    def test_piece_formula_reproduces_the_discount(self, mapping):
        c = curve(mapping)
        cuts = np.unique(np.concatenate([c.nodes(), np.arange(0.0, 45.0, 0.7)]))
        t1, length = cuts[:-1], np.diff(cuts)
        pc = c.pieces(t1, length)
        for frac in (0.0, 0.3, 0.5, 0.999):
            h = frac * length
            got = pc.factor * np.exp(-pc.force * h - pc.curvature * h * (h - length))
            assert_allclose(got, c.discount(t1 + h), rtol=1e-13)
        assert (pc.curvature != 0).any() == c.curved

    def test_segment_pieces_start_at_an_edge(self):
        pc = curve(SEGMENTS).pieces(np.array([5.0, 4.5]), np.array([1.0, 0.5]))
        assert_allclose(pc.factor, [1.052 ** -5, 1.045 ** -4.5], rtol=1e-14)
        assert_allclose(pc.force, [math.log(1.052), math.log(1.045)], rtol=1e-14)


class TestExposure:
    T = np.array([0.0, 0.4, 1.0, 2.5, 5.0, 7.0, 10.0, 19.0, 20.0, 29.9, 30.0, 50.0])

    @pytest.mark.parametrize("mapping", (*EXAMPLES, STEEP))
    def test_exposures_sum_to_t(self, mapping):
        assert_allclose(curve(mapping).exposure(self.T).sum(axis=-1), self.T, rtol=1e-14)

    @pytest.mark.parametrize("mapping", (*EXAMPLES, STEEP))
    def test_exposure_is_the_derivative_in_each_factor(self, mapping):
        # L(t) is linear in every ln(1 + rate), so a central difference is exact to rounding.
        c = curve(mapping)
        eps = 1e-6
        for k in range(c.size):
            bump = np.zeros(c.size)
            bump[k] = eps
            up = curve(shifted(mapping, bump)).log_discount(self.T)
            down = curve(shifted(mapping, -bump)).log_discount(self.T)
            assert_allclose(c.exposure(self.T)[:, k], (up - down) / (2 * eps), rtol=1e-7,
                            atol=1e-8)

    def test_spot_hat_functions(self):
        # by hand, node 5y of the spot example: rises from 1y to 5y, falls to 10y
        h = curve(SPOT).exposure(np.array([3.0, 5.0, 7.5, 12.0]))
        assert_allclose(h[:, 1], [3.0 * 0.5, 5.0, 7.5 * 0.5, 0.0], rtol=1e-15)

    @pytest.mark.parametrize("mapping", (*EXAMPLES, STEEP))
    def test_key_sums_equal_the_dense_exposure(self, mapping):
        c = curve(mapping)
        rng = np.random.default_rng(7)
        owner = rng.integers(0, 5, 300)
        t = rng.uniform(0.0, 60.0, 300)
        pv = rng.uniform(0.1, 2.0, 300)
        expected = np.zeros((5, c.size))
        np.add.at(expected, owner, pv[:, None] * c.exposure(t))
        assert_allclose(c.moments(owner, t, pv, 5).key, expected, rtol=1e-12)


class TestSensitivities:
    @pytest.mark.parametrize("mapping", (*EXAMPLES, STEEP))
    def test_against_central_differences(self, mapping):
        c = curve(mapping)
        got = c.moments(np.zeros(TIMES.size, dtype=int), TIMES, AMOUNTS * c.discount(TIMES),
                        1).measures()
        h = 1e-5

        def parallel(y):
            return value(shifted(mapping, [y] * c.size))

        v0, up, down = parallel(0.0), parallel(h), parallel(-h)
        assert_allclose(got.value, v0, rtol=1e-13)
        # effective duration -(1/V) dV/dy and convexity (1/V) d2V/dy2
        assert_allclose(got.duration, -(up - down) / (2 * h) / v0, rtol=1e-6)
        assert_allclose(got.convexity, (up - 2 * v0 + down) / h**2 / v0, rtol=1e-6)
        for k in range(c.size):
            bump = np.zeros(c.size)
            bump[k] = h
            krd = -(value(shifted(mapping, bump)) - value(shifted(mapping, -bump))) / (2 * h) / v0
            assert_allclose(got.key_rate_durations[0, k], krd, rtol=1e-6,
                            atol=1e-6 * got.duration[0])
        assert_allclose(got.key_rate_durations.sum(axis=1), got.duration, rtol=1e-13)

    @pytest.mark.parametrize(("i", "n"), ((0.04, 10), (0.07, 30), (0.015, 25), (-0.01, 5)))
    def test_level_annuity_certain(self, i, n):
        # Macaulay duration of a level annuity-immediate, (1 + i)/i - n/((1 + i)^n - 1):
        # a standard financial-mathematics result (recalled from memory). Its convexity:
        # sum t^2 v^t from the geometric series differentiated twice (common practice),
        # over the annuity-certain a_n = (1 - v^n)/i.
        v = 1 / (1 + i)
        t = np.arange(1, n + 1, dtype=float)
        s2 = v * (1 + v - (n + 1) ** 2 * v**n + (2 * n * n + 2 * n - 1) * v ** (n + 1)
                  - n * n * v ** (n + 2)) / (1 - v) ** 3
        annuity = (1 - v**n) / i
        for mapping in ({"kind": "flat", "rate": i},
                        {"kind": "spot", "terms": [2, 9], "rates": [i, i]},
                        {"kind": "forward", "edges": [3], "rates": [i, i]}):
            c = curve(mapping)
            got = c.moments(np.zeros(n, dtype=int), t, c.discount(t), 1).measures()
            assert_allclose(got.value, annuity, rtol=1e-12)
            assert_allclose(got.duration, (1 + i) / i - n / ((1 + i) ** n - 1), rtol=1e-10)
            assert_allclose(got.convexity, s2 / annuity, rtol=1e-10)

    def test_moments_add_up_by_owner(self):
        c = curve(SPOT)
        pv = AMOUNTS * c.discount(TIMES)
        owner = (TIMES > 20).astype(int)
        whole = c.moments(np.zeros(TIMES.size, dtype=int), TIMES, pv, 1)
        parts = c.moments(owner, TIMES, pv, 2)
        first = c.moments(np.zeros(np.sum(owner == 0), dtype=int), TIMES[owner == 0],
                          pv[owner == 0], 1)
        second = c.moments(np.zeros(np.sum(owner == 1), dtype=int), TIMES[owner == 1],
                           pv[owner == 1], 1)
        total = first + second
        assert_allclose(total.value, whole.value, rtol=1e-14)
        assert_allclose(total.key, whole.key, rtol=1e-14)
        assert_allclose(parts.value, [first.value[0], second.value[0]], rtol=1e-14)
        assert_allclose(parts.key, np.vstack([first.key, second.key]), rtol=1e-14)

    def test_zero_value_gives_undefined_measures(self):
        c = curve(SPOT)
        got = c.moments(np.array([0]), np.array([3.0]), np.array([2.0]), 2).measures()
        assert got.value[1] == 0 and np.isnan(got.duration[1]) and np.isnan(got.convexity[1])
        assert np.isnan(got.key_rate_durations[1]).all()
        assert np.isfinite(got.key_rate_durations[0]).all()


# ---- continuous payments ----------------------------------------------------------------------


def log_discount_mp(mapping, t, lib=mpmath):
    """L(t) by the definitions, in mpmath or (``lib=math``) in floats, independently of the
    module."""
    kind = mapping["kind"]
    if kind == "flat":
        return t * lib.log1p(mapping["rate"])
    c = [lib.log1p(r) for r in mapping["rates"]]
    if kind == "spot":
        terms = mapping["terms"]
        if t <= terms[0]:
            return t * c[0]
        if t >= terms[-1]:
            return t * c[-1]
        k = max(j for j in range(len(terms)) if terms[j] <= t)
        return t * (c[k] + (c[k + 1] - c[k]) * (t - terms[k]) / (terms[k + 1] - terms[k]))
    starts = [0, *mapping["edges"]]
    band = max(j for j in range(len(starts)) if starts[j] <= t)
    if kind == "segments":
        return t * c[band]
    total = sum(c[j] * (starts[j + 1] - starts[j]) for j in range(band))
    return total + c[band] * (t - starts[band])


def survival_form(name, q, r):
    """(g(h) for mpmath, closed form of integrals.py at a force, decay, pole) for one year of
    age with rate q, from position r in the year, h the time since the piece's start."""
    p = 1.0 - q
    qa, ra = np.array([q]), np.array([r])
    if name == "udd":
        return (lambda h: 1 - q * (r + h), lambda f, d: integrals.udd(qa, ra, f, d), 0.0,
                np.inf)
    if name == "constant-force":
        return (lambda h: mpmath.mpf(p) ** (r + h),
                lambda f, d: integrals.constant_force(qa, ra, f, d), -math.log(p), np.inf)
    if name == "balducci":
        return (lambda h: p / (p + q * (r + h)),
                lambda f, d: integrals.balducci(qa, ra, f, np.array([d])), 0.0,
                (p + q * r) / q)
    # two lives under UDD, the second with rate q / 2 from position 0
    q2 = q / 2
    return (lambda h: (1 - q * (r + h)) * (1 - q2 * h),
            lambda f, d: integrals.udd_pair(qa, ra, np.array([q2]), np.array([0.0]), f, d),
            0.0, np.inf)


FORMS = ("udd", "constant-force", "balducci", "udd-pair")
#: (structure, pieces (start, length) of at most a year that straddle no node)
PIECES = (
    (SPOT, ((1.0, 1.0), (1.2, 0.8), (5.3, 0.7), (12.0, 1.0), (0.1, 0.9), (31.0, 1.0))),
    (STEEP, ((0.5, 1.0), (0.7, 0.3), (1.5, 0.5), (2.0, 1.0))),
    ({"kind": "spot", "terms": [10, 11], "rates": [0.01, 0.9]}, ((10.0, 1.0),)),
    (SEGMENTS, ((4.2, 0.8), (5.0, 1.0))),
    (FORWARD, ((9.5, 0.5), (10.0, 1.0))),
    ({"kind": "flat", "rate": -0.3}, ((3.0, 1.0),)),
)
#: (q, where the piece starts within the year of age as a fraction of the room before its end)
RATES_IN_YEAR = ((0.01, 0.0), (0.3, 0.7), (0.9, 0.0), (0.999, 0.5))


class TestContinuousPieces:
    """Integral of g(t) D(t) over a piece, g a within-year survival form, against mpmath."""

    @pytest.mark.parametrize("form", FORMS)
    @pytest.mark.parametrize(("mapping", "pieces"), PIECES)
    def test_closed_form_plus_correction(self, mapping, pieces, form):
        c = curve(mapping)
        mpmath.mp.dps = 25
        for t1, length in pieces:
            pc = c.pieces(np.array([t1]), np.array([length]))
            for q, room in RATES_IN_YEAR:
                g, closed, decay, pole = survival_form(form, q, room * (1 - length))
                rule = c.gauss_rule(t1, length, order=8, correction=True, decay=decay,
                                    pole=pole)
                values = np.array([float(g(x - t1)) for x in rule.time])
                got = pc.factor[0] * closed(pc.force, length)[0] + np.sum(rule.weight * values)
                expected = mpmath.quad(lambda h, g=g, t1=t1: g(h) * mpmath.exp(
                    -log_discount_mp(mapping, t1 + h)), [0, length])
                assert_allclose(got, float(expected), rtol=1e-12, atol=0)

    @pytest.mark.parametrize("form", FORMS)
    @pytest.mark.parametrize(("mapping", "pieces"), PIECES[:3])
    def test_gauss_rule_with_moments(self, mapping, pieces, form):
        # integral of t^n g(t) D(t), n = 0, 1, 2, against scipy's adaptive quadrature
        c = curve(mapping)
        for t1, length in pieces:
            for q, room in RATES_IN_YEAR:
                g, _, decay, pole = survival_form(form, q, room * (1 - length))
                expected = [integrate.quad(
                    lambda h, g=g, n=n, t1=t1: (t1 + h) ** n * float(g(h)) * math.exp(
                        -log_discount_mp(mapping, t1 + h, math)), 0, length,
                    epsabs=0, epsrel=1e-13, limit=200)[0] for n in (0, 1, 2)]
                for order in RULE_REACH:
                    rule = c.gauss_rule(t1, length, order=order, decay=decay, pole=pole)
                    values = np.array([float(g(x - t1)) for x in rule.time])
                    got = [np.sum(rule.weight * values * rule.time**n) for n in (0, 1, 2)]
                    assert_allclose(got, expected, rtol=1e-12, atol=0)

    def test_no_correction_where_the_discount_is_exponential(self):
        for mapping in (FLAT, SEGMENTS, FORWARD):
            rule = curve(mapping).gauss_rule([0.0, 5.0], [1.0, 1.0], correction=True)
            assert rule.time.size == 0
        # beyond the last term a spot curve is flat: no points there either
        rule = curve(SPOT).gauss_rule([31.0, 2.0], [1.0, 1.0], correction=True)
        assert_allclose(np.unique(rule.piece), [1])

    def test_points_follow_their_piece(self):
        rule = curve(SPOT).gauss_rule([2.0, 3.0, 40.0], [1.0, 0.5, 1.0], order=8)
        assert_allclose(np.bincount(rule.piece), [8, 8, 8])
        starts = np.array([2.0, 3.0, 40.0])[rule.piece]
        assert np.all((rule.time > starts) & (rule.time < starts + [1.0, 0.5, 1.0][0]))

    def test_bad_arguments(self):
        with pytest.raises(ValueError):
            curve(SPOT).gauss_rule(1.0, 1.0, order=10)
        with pytest.raises(ValueError):
            curve(SPOT).gauss_rule(1.0, 1.0, pole=0.0)


def continuous_value(mapping, q=0.02, years=40.0):
    """Value of a continuous payment at rate 1 for ``years`` with survival 1 - q h in each
    year (UDD, the same rate every year): closed form plus correction on pieces cut at whole
    years and the structure's nodes."""
    c = curve(mapping)
    cuts = np.unique(np.concatenate([np.arange(0.0, years + 1.0),
                                     c.nodes()[c.nodes() < years]]))
    t1, length = cuts[:-1], np.diff(cuts)
    r = t1 - np.floor(t1)
    start = (1 - q) ** np.floor(t1)
    pc = c.pieces(t1, length)
    total = np.sum(start * pc.factor * integrals.udd(q, r, pc.force, length))
    rule = c.gauss_rule(t1, length, order=8, correction=True)
    h = rule.time - np.floor(rule.time)
    total += np.sum(rule.weight * (1 - q) ** np.floor(rule.time) * (1 - q * h))
    return total, c, t1, length


class TestContinuousSensitivities:
    @pytest.mark.parametrize("mapping", (*EXAMPLES, STEEP))
    def test_against_central_differences(self, mapping):
        v0, c, t1, length = continuous_value(mapping)
        rule = c.gauss_rule(t1, length)
        g = 0.98 ** np.floor(rule.time) * (1 - 0.02 * (rule.time - np.floor(rule.time)))
        got = c.moments(np.zeros(rule.time.size, dtype=int), rule.time, rule.weight * g,
                        1).measures()
        assert_allclose(got.value, v0, rtol=1e-12)
        h = 1e-5
        up = continuous_value(shifted(mapping, [h] * c.size))[0]
        down = continuous_value(shifted(mapping, [-h] * c.size))[0]
        assert_allclose(got.duration, -(up - down) / (2 * h) / v0, rtol=1e-6)
        assert_allclose(got.convexity, (up - 2 * v0 + down) / h**2 / v0, rtol=1e-6)
        for k in range(c.size):
            bump = np.zeros(c.size)
            bump[k] = h
            krd = -(continuous_value(shifted(mapping, bump))[0]
                    - continuous_value(shifted(mapping, -bump))[0]) / (2 * h) / v0
            assert_allclose(got.key_rate_durations[0, k], krd, rtol=1e-6,
                            atol=1e-6 * got.duration[0])

    @pytest.mark.parametrize(("i", "n"), ((0.05, 10.0), (0.02, 33.5), (-0.01, 4.0)))
    def test_continuous_annuity_certain(self, i, n):
        # common practice: a-bar_n = (1 - v^n)/delta; integral of t e^(-delta t) gives the
        # duration 1/delta - n v^n/(1 - v^n); integral of t^2 e^(-delta t) is
        # (2/delta^3)(1 - v^n (1 + delta n + (delta n)^2/2)).
        delta = math.log1p(i)
        vn = (1 + i) ** -n
        c = curve({"kind": "flat", "rate": i})
        cuts = np.append(np.arange(0.0, n), n)
        rule = c.gauss_rule(cuts[:-1], np.diff(cuts))
        got = c.moments(np.zeros(rule.time.size, dtype=int), rule.time, rule.weight, 1)
        annuity = (1 - vn) / delta
        assert_allclose(got.value, annuity, rtol=1e-13)
        assert_allclose(got.measures().duration, 1 / delta - n * vn / (1 - vn), rtol=1e-12)
        second = 2 / delta**3 * (1 - vn * (1 + delta * n + (delta * n) ** 2 / 2))
        assert_allclose(got.second, second, rtol=1e-11)


# ---- properties ---------------------------------------------------------------------------------

PROPERTY = settings(max_examples=60, deadline=None)


class TestProperties:
    @PROPERTY
    @given(strategies.curve_mappings(), strategies.cash_flows(), st.floats(1e-3, 0.05))
    def test_values_finite_positive_and_falling_as_every_rate_rises(self, mapping, flows,
                                                                   step):
        times, amounts = (np.array(x) for x in flows)
        base = value(mapping, times, amounts)
        higher = value(shifted(mapping, [math.log1p(step)] * curve(mapping).size), times,
                       amounts)
        assert np.isfinite(base) and base > 0
        assert 0 < higher < base

    @settings(max_examples=25, deadline=None)
    @given(strategies.curve_mappings(), st.floats(1e-3, 0.05))
    def test_continuous_values_fall_as_every_rate_rises(self, mapping, step):
        base = continuous_value(mapping, years=25.0)[0]
        higher = continuous_value(shifted(mapping, [math.log1p(step)] * curve(mapping).size),
                                  years=25.0)[0]
        assert np.isfinite(base) and 0 < higher < base

    @PROPERTY
    @given(strategies.curve_mappings(), strategies.cash_flows())
    def test_key_rate_durations_sum_to_the_duration(self, mapping, flows):
        c = curve(mapping)
        times, amounts = (np.array(x) for x in flows)
        got = c.moments(np.zeros(times.size, dtype=int), times, amounts * c.discount(times),
                        1).measures()
        assert_allclose(got.key_rate_durations.sum(axis=1), got.duration, rtol=1e-12)
        assert times.min() * (1 - 1e-12) <= got.duration[0] <= times.max() * (1 + 1e-12)
        assert got.convexity[0] >= got.duration[0] ** 2 * (1 - 1e-12)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 40), st.floats(-1e3, 1e3)), max_size=300),
       st.integers(0, 5), st.booleans())
def test_sums_by_owner_are_bincount_s(pairs, spare, in_order):
    # np.bincount is the definition; owners listed in order are summed by runs (to
    # rounding: a sum of n terms in any order is within about n eps of the sum of their
    # magnitudes, the standard error bound of recursive summation, Higham, "Accuracy and
    # Stability of Numerical Algorithms", ch. 4, recalled from memory), others by bincount
    # itself (exactly).
    from service.engine.curves import owner_sums

    if in_order:
        pairs = sorted(pairs, key=lambda pair: pair[0])
    owner = np.array([o for o, _ in pairs], dtype=np.intp)
    w1 = np.array([w for _, w in pairs], dtype=float)
    w2 = w1 * 0.5 - 3.0
    size = int(owner.max(initial=-1)) + 1 + spare
    got = owner_sums(owner, size, w1, w2)
    for w, sums in zip((w1, w2), got, strict=True):
        want = np.bincount(owner, w, minlength=size).astype(float)
        assert sums.dtype == float and sums.shape == (size,)
        scale = np.bincount(owner, np.abs(w), minlength=size)
        assert np.all(np.abs(sums - want) <= 1e-15 * max(len(pairs), 1) * scale)
    if len(owner) > 1 and not np.all(owner[1:] >= owner[:-1]):
        for w, sums in zip((w1, w2), got, strict=True):
            assert np.array_equal(sums, np.bincount(owner, w, minlength=size).astype(float))
