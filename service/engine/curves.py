"""Interest structures: flat, spot curve, segment rates and forward bands, with sensitivities.

A structure comes from a plain mapping (a basis' ``[interest]`` table or a request's
``interest`` object) through :meth:`Curve.from_mapping`, which validates it and raises
:class:`CurveError` with field paths such as ``"interest.rates.2"``::

    {"kind": "flat", "rate": 0.04}
    {"kind": "spot", "terms": [1, 5, 10, 30], "rates": [0.031, 0.036, 0.04, 0.042]}
    {"kind": "segments", "edges": [5, 20], "rates": [0.045, 0.052, 0.055]}
    {"kind": "forward", "edges": [10], "rates": [0.05, 0.035]}

Every rate is an annual effective rate; internally each is held as its continuously
compounded equivalent c = ln(1 + rate). Everything is expressed through the log-discount
L(t) = -ln D(t), D the discount factor for time t (years, t >= 0):

- ``flat``: L(t) = c t.
- ``spot``: L(t) = t r(t), r the continuously compounded spot rate, linear in t between the
  terms T_k (r(T_k) = c_k) and held flat before the first term and beyond the last.
- ``segments``: bands [0, e_0), [e_0, e_1), ..., [e_last, inf); a time t in band b is
  discounted at its band's rate as an annual effective spot rate: L(t) = c_b t (D jumps at an
  edge; a time exactly on an edge belongs to the band that starts there).
- ``forward``: the same bands; c_b is the force of interest throughout band b, compounded
  through the bands: L(t) = sum_b c_b |[0, t] intersect band b|.

Sensitivities (the factors y_k of a structure)
----------------------------------------------
A parallel shift y of the continuously compounded spot rates changes L(t) to L(t) + y t (for
a flat rate it is a shift of ln(1 + i)). Each structure has K key-rate factors whose
exposures h_k(t) = dL(t)/dy_k sum to t:

- ``flat``: one factor, h(t) = t.
- ``spot``: one per term: a triangular bump of node k's continuously compounded rate,
  h_k(t) = t w_k(t), w_k the hat function of linear interpolation (1 at T_k, 0 at the
  neighbouring terms; the first and last hats stay 1 beyond the ends).
- ``segments``: one per band: h_b(t) = t while t is in band b, else 0.
- ``forward``: one per band: h_b(t) = time spent in band b up to t.

The factor is always the continuously compounded rate ln(1 + rate); the derivative with respect
to the annual effective rate itself is the same duration divided by (1 + rate). For payments
with present values PV_j at times t_j, V = sum PV_j and

    duration           = -(1/V) dV/dy    = sum t_j PV_j / V
    convexity          =  (1/V) d2V/dy2  = sum t_j^2 PV_j / V
    key-rate duration k = -(1/V) dV/dy_k = sum h_k(t_j) PV_j / V   (they sum to the duration)

computed from the expected payments, never by revaluing (:meth:`Curve.moments`).

How the engine uses this module (discrete.py, continuous.py)
--------------------------------------------------------------------------------------
``Valuation.interest`` becomes a :class:`Curve` (``Curve.flat(rate)`` for a plain rate); the
audit block takes ``curve.describe()`` plus ``"digest": curve.digest()`` and the source.

Discrete payments
    ``_points``: ``discount = curve.discount(t)`` instead of ``np.exp(-delta * t)``.
    ``_guaranteed_values``: the annuity-certain closed form needs one force of interest; keep it
    when ``curve.constant_force is not None`` (use that force as delta) and otherwise value the
    guaranteed payment dates as points like the others (expand them with ``_expand``; they then
    count as work). Woolhouse blocks: ``v^t`` becomes ``curve.discount(t)`` and ``delta f(t)``
    in the third term becomes ``curve.forward_force(t) * f(t)``; under segment rates D jumps at
    an edge, so a Woolhouse year that straddles an edge should be summed exactly instead.
    Schedules: ``discount = curve.discount(time)``.

Continuous payments
    ``_segments``: add ``nodes = curve.nodes()`` to the cut times of every window (one more
    entry of its list: ``(np.repeat(local, nodes.size), np.tile(nodes, local.size))``; the
    existing clip to [u, end] and de-duplication keep those inside), so that no segment
    straddles a node.
    ``_segment_integral``: with ``pc = curve.pieces(t1, length)`` replace every
    ``np.exp(-delta * t1) * F(..., delta, length)`` by ``pc.factor * F(..., pc.force, length)``
    (the closed forms of integrals.py take an array of forces unchanged). Within a piece
    D(t1 + h) = factor exp(-force h - curvature h (h - length)); the curvature is 0 except on a
    spot curve between two terms. Where the structure is curved (``curve.curved``), add the
    correction ``rule = curve.gauss_rule(t1, length, order=8, correction=True, decay=...,
    pole=...)`` (see below for decay and pole): with ``o = own[rule.piece]`` evaluate the
    integrand without discount, ``g = np.where(certain[rule.piece], batch.certain_weight[o],
    batch.life_weight(o, rule.time))``, and add ``np.bincount(rule.piece, rule.weight * g,
    minlength=t1.size)`` to the segment integrals before the escalation factor. Order 8 is
    ample there: the correction's integrand carries expm1(-curvature h (h - length)), below
    1e-3 in size on market curves. The undiscounted expected amount (delta = 0) does not
    involve the curve.

Sensitivities (on request)
    Collect per-point (owner, time, present value) and call ``curve.moments(owner, time, pv,
    size)``; :class:`Moments` add up, so chunks, guaranteed and life-contingent parts are summed
    with ``+``, and ``moments.measures()`` gives value, duration, convexity and key-rate
    durations per item (NaN where an item's value is 0, as for a life dead for certain before
    its window opens: the API should answer null there); ``curve.factors()`` names the
    key rates. Discrete items: the payment dates themselves (exact summation, the guaranteed
    dates expanded as points). Continuous items: ``rule = curve.gauss_rule(t1, length,
    decay=..., pole=...)`` on every segment gives points ``time = rule.time`` with present
    value ``rule.weight * growth * g`` (g as above); a Gauss-Legendre rule integrates g D,
    t g D and t^2 g D alike. ``decay`` is the rate of the exponential in g (under the
    constant-force assumption -ln p of each life's year, summed for two lives; 0 under UDD,
    whose survival is a polynomial) and ``pole`` the distance from the piece's start back to
    the nearest singularity of g (under Balducci (p + q r) / q for each life, r the position in
    the year at the piece's start; inf otherwise). With those the rule is exact to rounding.
    It makes about ``order`` points per segment: build it chunk by chunk as the engine does.

Method block: ``curve.method()`` gives the discounting and the continuous integration in
words, for the engine's ``method_of``.
"""

import hashlib
import json
import math
import numbers
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from functools import cached_property, lru_cache
from types import MappingProxyType

import numpy as np

from service.engine.errors import EngineError

KINDS = ("flat", "spot", "segments", "forward")
#: At most this many rates (spot terms, or bands) in one structure.
MAX_POINTS = 200
#: Gauss-Legendre orders offered by :meth:`Curve.gauss_rule`, with the largest exponent
#: variation (|d ln integrand / dt| x piece length) each integrates to rounding.
#: Measured against mpmath for u^k e^(-+lambda u), k = 0, 2, 4 on [0, 1]: worst relative error
#: 2e-14 (order 8, lambda 2), 4e-16 (order 12, lambda 6), 2e-15 (order 16, lambda 10).
RULE_REACH = {8: 2.0, 12: 6.0, 16: 10.0}
#: A piece is kept at most this fraction of its distance from a singularity of the integrand.
_POLE_FRACTION = 0.25
_FIELDS = {"flat": ("rate",), "spot": ("terms", "rates"), "segments": ("edges", "rates"),
           "forward": ("edges", "rates")}


def owner_sums(owner: np.ndarray, size: int, *weights: np.ndarray) -> list[np.ndarray]:
    """``np.bincount(owner, w, minlength=size)`` (as floats) for each ``w`` in ``weights``.

    Where ``owner`` is sorted (payments listed owner by owner, as the engine lists them),
    each owner's run of weights is summed by ``np.add.reduceat``: a contiguous sum, several
    times quicker than bincount's scattered one (the sums agree to rounding).
    """
    if owner.size and 0 <= owner[0] and owner[-1] < size \
            and bool((owner[1:] >= owner[:-1]).all()):
        starts = np.flatnonzero(np.concatenate(([True], owner[1:] != owner[:-1])))
        at = owner[starts]
        out = []
        for w in weights:
            sums = np.zeros(size)
            sums[at] = np.add.reduceat(w, starts)
            out.append(sums)
        return out
    return [np.bincount(owner, w, minlength=size).astype(float, copy=False) for w in weights]


class CurveError(EngineError):
    """An interest structure is malformed.

    ``errors`` maps field paths such as ``"interest.rates.2"`` to messages (for a 422).
    """

    def __init__(self, errors: dict[str, list[str]]):
        self.errors = errors
        path, messages = next(iter(errors.items()))
        super().__init__(f"{path}: {messages[0]}")


def _number(value) -> bool:
    return isinstance(value, numbers.Real) and not isinstance(value, bool)


def _finite(value) -> bool:
    """Whether a real number is finite as a float (an integer too large for one is not)."""
    try:
        return math.isfinite(float(value))
    except OverflowError:
        return False


def _check(kind, knots, rates, path: str) -> dict[str, list[str]]:
    """Return the problems of a structure as {field path: messages}."""
    errors: dict[str, list[str]] = {}

    def add(where, message):
        errors.setdefault(where, []).append(message)

    knot_name = "terms" if kind == "spot" else "edges"
    if kind == "flat" and (len(rates) != 1 or knots):
        add(f"{path}.rate", "a flat structure has exactly one rate and no terms or edges")
        return errors
    for name, values in ((knot_name, knots), ("rates", rates)):
        if kind == "flat" and name != "rates":
            continue
        if len(values) > MAX_POINTS:
            add(f"{path}.{name}", f"at most {MAX_POINTS} values")
            continue
        for j, v in enumerate(values):
            where = f"{path}.rate" if kind == "flat" else f"{path}.{name}.{j}"
            if not _number(v):
                add(where, "must be a number")
            elif not _finite(v):
                add(where, "must be finite")
            elif name == "rates" and not v > -1:
                add(where, "must be above -1")
            elif name != "rates" and not v > 0:
                add(where, "must be a positive number of years")
            elif name != "rates" and j > 0 and _number(values[j - 1]) \
                    and _finite(values[j - 1]) and not v > values[j - 1]:
                add(where, f"must be greater than the one before it ({values[j - 1]:g})")
    if kind == "spot":
        if not knots:
            add(f"{path}.terms", "at least one term")
        elif len(rates) != len(knots) and f"{path}.rates" not in errors:
            add(f"{path}.rates", f"needs one rate per term ({len(knots)} terms, "
                                 f"{len(rates)} rates)")
    elif kind in ("segments", "forward") and len(rates) != len(knots) + 1 \
            and f"{path}.rates" not in errors:
        add(f"{path}.rates", f"needs one more rate than edges ({len(knots)} edges, "
                             f"{len(rates)} rates)")
    return errors


@dataclass(frozen=True, eq=False)
class Pieces:
    """The discount on pieces [t1, t1 + length], for 0 <= h <= length:

    D(t1 + h) = factor exp(-force h - curvature h (h - length)).

    ``force`` is the chord force (L(t1 + length) - L(t1)) / length; ``curvature`` is 0 except
    on a spot curve between two terms (where it is the slope of r).
    """

    factor: np.ndarray
    force: np.ndarray
    curvature: np.ndarray


@dataclass(frozen=True, eq=False)
class Rule:
    """Quadrature points: integral over piece i of g(t) D(t) dt = sum of weight x g(time)
    over the points with ``piece == i`` (or, with ``correction``, that integral less the one
    with the chord discount factor x exp(-force h))."""

    piece: np.ndarray
    time: np.ndarray
    weight: np.ndarray


@dataclass(frozen=True, eq=False)
class Measures:
    """Per-owner value and sensitivities (NaN where the value is 0: they are undefined)."""

    value: np.ndarray
    duration: np.ndarray
    convexity: np.ndarray
    key_rate_durations: np.ndarray | None  # (owners, K)


@dataclass(frozen=True, eq=False)
class Moments:
    """Per-owner sums over payments: PV, t PV, t^2 PV and h_k(t) PV. They add with ``+``."""

    value: np.ndarray
    first: np.ndarray
    second: np.ndarray
    key: np.ndarray | None  # (owners, K)

    def __add__(self, other: "Moments") -> "Moments":
        key = None if self.key is None or other.key is None else self.key + other.key
        return Moments(self.value + other.value, self.first + other.first,
                       self.second + other.second, key)

    def measures(self) -> Measures:
        """Return value, duration = sum t PV / V, convexity = sum t^2 PV / V and key-rate
        durations sum h_k PV / V."""
        v = self.value
        nonzero = v != 0
        safe = np.where(nonzero, v, 1.0)

        def per(x):
            return np.where(nonzero, x / safe, np.nan) if x.ndim == 1 else \
                np.where(nonzero[:, None], x / safe[:, None], np.nan)

        return Measures(v, per(self.first), per(self.second),
                        None if self.key is None else per(self.key))


def _readonly(a) -> np.ndarray:
    a = np.array(a, dtype=float)
    a.flags.writeable = False
    return a


@dataclass(frozen=True)
class Curve:
    """An interest structure; ``knots`` are the spot terms or band edges (empty for flat).

    Build it with :meth:`from_mapping` or :meth:`flat`; the constructor validates too.
    Equal structures compare equal and have equal digests.
    """

    kind: str
    knots: tuple[float, ...]
    rates: tuple[float, ...]

    def __post_init__(self):
        if self.kind not in KINDS:
            raise CurveError({"interest.kind": [f"must be one of {', '.join(KINDS)}"]})
        errors = _check(self.kind, list(self.knots), list(self.rates), "interest")
        if errors:
            raise CurveError(errors)
        if not (type(self.knots) is tuple and type(self.rates) is tuple
                and all(type(x) is float for x in (*self.knots, *self.rates))):
            raise TypeError("knots and rates must be tuples of floats (Curve.flat and "
                            "Curve.from_mapping convert them)")

    @cached_property
    def _arrays(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """(c, t, start, acc): forces ln(1 + rate), knots, band starts (0, e_0, e_1, ...;
        the knots for spot) and, for forward bands, ln D at each band's start."""
        c = np.log1p(np.array(self.rates))
        t = np.array(self.knots)
        start = np.concatenate([[0.0], t]) if self.kind != "spot" else t
        acc = np.zeros(len(self.rates))
        if self.kind == "forward":
            acc[1:] = np.cumsum(c[:-1] * np.diff(start))
        return tuple(_readonly(a) for a in (c, t, start, acc))

    @property
    def _c(self) -> np.ndarray:
        return self._arrays[0]

    @property
    def _t(self) -> np.ndarray:
        return self._arrays[1]

    @property
    def _start(self) -> np.ndarray:
        return self._arrays[2]

    @property
    def _acc(self) -> np.ndarray:
        return self._arrays[3]

    # ---- construction and audit -------------------------------------------------------------

    @classmethod
    def flat(cls, rate: float) -> "Curve":
        """Return the flat structure at the annual effective ``rate``."""
        if isinstance(rate, numbers.Real) and not isinstance(rate, bool):
            rate = float(rate)  # (anything else is refused by the checks, by field)
        return cls("flat", (), (rate,))

    @classmethod
    def from_mapping(cls, mapping, *, path: str = "interest") -> "Curve":
        """Build a structure from a plain mapping, validating every field.

        Parameters
        ----------
        mapping : Mapping
            ``kind`` and the fields of that kind (see the module docstring).
        path : str
            Prefix of the field paths in errors (``"interest"``, or e.g. ``"items.3.interest"``).

        Raises
        ------
        CurveError
            With every problem found, by field path (``"interest.rates.2"``).
        """
        if not isinstance(mapping, Mapping):
            raise CurveError({path: ["must be an object with a kind"]})
        kind = mapping.get("kind")
        if kind not in KINDS:
            raise CurveError({f"{path}.kind": [f"must be one of {', '.join(KINDS)}"]})
        errors: dict[str, list[str]] = {}
        wanted = _FIELDS[kind]
        for key in mapping:
            if key != "kind" and key not in wanted:
                errors[f"{path}.{key}"] = [f"unknown field for kind {kind!r}"]
        values = {}
        for name in wanted:
            if name not in mapping:
                errors[f"{path}.{name}"] = ["required"]
                continue
            v = mapping[name]
            if name == "rate":
                values[name] = [v]
            elif isinstance(v, Sequence) and not isinstance(v, str | bytes):
                values[name] = list(v)
            else:
                errors[f"{path}.{name}"] = ["must be a list of numbers"]
        if errors:
            raise CurveError(errors)
        rates = values.get("rate") or values["rates"]
        knots = [] if kind == "flat" else values[wanted[0]]
        errors = _check(kind, knots, rates, path)
        if errors:
            raise CurveError(errors)
        return cls(kind, tuple(float(k) for k in knots), tuple(float(r) for r in rates))

    def doubled(self) -> "Curve":
        """Return the same structure at twice every force of interest: D(t)^2 for D(t).

        Each rate i becomes (1 + i)^2 - 1, which doubles ln(1 + i); spot interpolation, bands
        and compounding are linear in those forces, so the discount factor is squared. (The
        second moment of a benefit's present value is its value at double the force.)
        """
        return Curve(self.kind, self.knots, tuple(math.expm1(2 * math.log1p(r))
                                                  for r in self.rates))

    def describe(self) -> dict:
        """Return the canonical audit form: kind, terms or edges, and rates as floats.

        ``Curve.from_mapping(curve.describe()) == curve``.
        """
        if self.kind == "flat":
            return {"kind": "flat", "rate": self.rates[0]}
        name = "terms" if self.kind == "spot" else "edges"
        return {"kind": self.kind, name: list(self.knots), "rates": list(self.rates)}

    def digest(self) -> str:
        """Return ``"sha256:..."`` over the canonical JSON of :meth:`describe` (sorted keys,
        no spaces, shortest round-trip floats), so a quote can be matched to its structure."""
        text = json.dumps(self.describe(), sort_keys=True, separators=(",", ":"),
                          allow_nan=False)
        return "sha256:" + hashlib.sha256(text.encode("ascii")).hexdigest()

    def factors(self) -> tuple[dict, ...]:
        """Return the key-rate factors in order: ``{"term": T}`` for a spot curve, else
        ``{"from": a, "to": b}`` for each band (``"to": None`` for the last)."""
        if self.kind == "spot":
            return tuple({"term": t} for t in self.knots)
        ends = (*self.knots, None)
        return tuple({"from": float(a), "to": b} for a, b in zip(self._start, ends, strict=True))

    def method(self) -> dict:
        """Return how discount factors and continuous integrals are computed, in words."""
        return dict(method_words(self.kind, self.curved))

    # ---- discounting -----------------------------------------------------------------------

    @property
    def size(self) -> int:
        """Return K, the number of key-rate factors."""
        return len(self.rates)

    @cached_property
    def constant_force(self) -> float | None:
        """Return the force of interest where the structure is one flat rate, else None."""
        c = self._c
        return float(c[0]) if np.all(c == c[0]) else None

    @property
    def curved(self) -> bool:
        """True where some piece's discount is not exp(-a - b t) (a spot curve that moves)."""
        return self.kind == "spot" and self.constant_force is None

    def nodes(self) -> np.ndarray:
        """Return the times at which the formula of L(t) or of an exposure changes.

        Spot terms (when there are two or more), band edges; empty for a flat rate. Pieces
        of continuous integration must not straddle them.
        """
        if self.kind == "spot" and self._t.size < 2:
            return np.zeros(0)
        return np.array(self._t)

    def _band(self, t):
        return np.searchsorted(self._t, t, side="right")

    def log_discount(self, t):
        """Return L(t) = -ln D(t) for an array of times t >= 0 (shape of t)."""
        t = np.asarray(t, dtype=float)
        c = self._c
        if self.kind == "flat":
            return c[0] * t
        if self.kind == "spot":
            return t * np.interp(t, self._t, c)
        if self.kind == "segments":
            return c[self._band(t)] * t
        # Piecewise linear through (band start, L there), the last band's force beyond.
        return np.interp(t, self._start, self._acc) + c[-1] * np.maximum(t - self._start[-1], 0)

    def discount(self, t):
        """Return the discount factor D(t) = exp(-L(t)) for an array of times t >= 0."""
        return np.exp(-self.log_discount(t))

    def forward_force(self, t):
        """Return dL/dt at t (the right derivative): the instantaneous forward force.

        For segments this is the band's force; the jumps of D at the edges are not included.
        """
        t = np.asarray(t, dtype=float)
        c = self._c
        if self.kind == "flat":
            return np.full_like(t, c[0])
        if self.kind == "spot":
            k, slope, inside = self._spot_interval(t)
            return np.where(inside, c[k] + slope * (2.0 * t - self._t[k]),
                            np.interp(t, self._t, c))
        return c[self._band(t)]

    def _spot_interval(self, t):
        """For each t: k with T_k <= t < T_k+1 (clipped), the slope of r there, inside?"""
        terms, c = self._t, self._c
        n = terms.size
        k = np.clip(np.searchsorted(terms, t, side="right") - 1, 0, max(n - 2, 0))
        inside = (t >= terms[0]) & (t < terms[-1])
        if n < 2:
            return k, np.zeros_like(t), np.zeros_like(inside)
        slope = (c[k + 1] - c[k]) / (terms[k + 1] - terms[k])
        return k, slope, inside

    # ---- key-rate exposures ----------------------------------------------------------------

    def _sparse_exposure(self, t):
        """Return (k0, e0, k1, e1): at most two factors with nonzero exposure, for spot and
        segments (the second is zero for segments)."""
        if self.kind == "segments":
            b = self._band(t)
            return b, t, b, np.zeros_like(t)
        n = self._t.size
        if n == 1:
            return np.zeros(t.shape, dtype=np.intp), t, np.zeros(t.shape, dtype=np.intp), 0 * t
        # Position among the terms, k + (t - T_k)/(T_k+1 - T_k), held at 0 and n - 1 outside.
        position = np.interp(t, self._t, np.arange(n, dtype=float))
        k = np.minimum(position.astype(np.intp), n - 2)
        lam = position - k
        return k, t * (1.0 - lam), k + 1, t * lam

    def exposure(self, t):
        """Return h_k(t) = dL(t)/dy_k for every factor k, shape ``t.shape + (K,)``.

        Summed over k it is t (the parallel shift). Dense; :meth:`moments` sums without it.
        """
        t = np.asarray(t, dtype=float)
        out = np.zeros(t.shape + (self.size,))
        if self.kind == "flat":
            out[..., 0] = t
        elif self.kind == "forward":
            width = np.append(np.diff(self._start), np.inf)
            out[...] = np.clip(t[..., None] - self._start, 0.0, width)
        else:
            k0, e0, k1, e1 = self._sparse_exposure(t)
            np.put_along_axis(out, k0[..., None], e0[..., None], axis=-1)
            # k1 may equal k0 (then e1 is 0 and adding keeps e0).
            prev = np.take_along_axis(out, k1[..., None], axis=-1)
            np.put_along_axis(out, k1[..., None], prev + e1[..., None], axis=-1)
        return out

    def _key_sums(self, owner, t, pv, size):
        """Return (size, K) sums of pv x h_k(t) by owner, without a dense (n, K) array."""
        K = self.size
        if self.kind == "flat":
            return np.bincount(owner, pv * t, minlength=size)[:, None]
        if self.kind == "forward":
            b = self._band(t)
            cell = owner * K
            cell += b
            mass = np.bincount(cell, pv, minlength=size * K).reshape(size, K)
            exposed = self._start[b]  # then pv x (t - the band's start), in place
            np.subtract(t, exposed, out=exposed)
            exposed *= pv
            part = np.bincount(cell, exposed, minlength=size * K).reshape(size, K)
            # Payments in later bands are exposed to the whole width of band k.
            later = np.cumsum(mass[:, ::-1], axis=1)[:, ::-1] - mass
            width = np.append(np.diff(self._start), 0.0)
            return part + later * width
        k0, e0, k1, e1 = self._sparse_exposure(t)
        out = np.bincount(owner * K + k0, pv * e0, minlength=size * K)
        out += np.bincount(owner * K + k1, pv * e1, minlength=size * K)
        return out.reshape(size, K)

    def moments(self, owner, time, present_value, size: int, *, key_rates: bool = True
                ) -> Moments:
        """Return per-owner sums of PV, t PV, t^2 PV and h_k(t) PV.

        Parameters
        ----------
        owner : int array, the owner (item) of each payment, 0 <= owner < size
        time : float array, the payment times t >= 0
        present_value : float array, each payment's expected present value (amount x
            probability x discount under this structure), or a quadrature point's weighted
            integrand (see :meth:`gauss_rule`)
        size : number of owners
        key_rates : also the (size, K) key-rate sums (skip them when not asked for)

        Notes
        -----
        dV/dy = -sum t PV, d2V/dy2 = sum t^2 PV and dV/dy_k = -sum h_k(t) PV, because
        PV = amount x probability x exp(-L(t)) and dL/dy = t, dL/dy_k = h_k(t).
        """
        owner = np.asarray(owner, dtype=np.intp)
        t = np.asarray(time, dtype=float)
        pv = np.asarray(present_value, dtype=float)
        pvt = pv * t
        value, first, second = owner_sums(owner, size, pv, pvt, pvt * t)
        if not key_rates:
            key = None
        elif self.kind == "flat":  # one factor, whose exposure is t: the first moment
            key = first[:, None].copy()
        else:
            key = self._key_sums(owner, t, pv, size).astype(float)
        return Moments(value, first, second, key)

    # ---- continuous integration ------------------------------------------------------------

    def pieces(self, t1, length) -> Pieces:
        """Return (factor, force, curvature) of the discount on each piece [t1, t1 + length].

        The piece's formula is the one at its midpoint; pieces must not straddle
        :meth:`nodes`. Then exactly, for 0 <= h <= length,

            D(t1 + h) = factor exp(-force h - curvature h (h - length)).

        - flat, segments and forward bands: curvature 0, force the band's c_b and factor
          D(t1) (for segments exp(-c_b t1) of the piece's own band);
        - spot, outside the terms: the same with c_first or c_last;
        - spot, between T_k and T_k+1: L(t) = c_k t + s t (t - T_k) with s the slope of r, so
          force = c_k + s (2 t1 - T_k + length) (the chord) and curvature = s.
        """
        t1, length = np.broadcast_arrays(np.asarray(t1, dtype=float),
                                         np.asarray(length, dtype=float))
        mid = t1 + length / 2.0
        c = self._c
        zero = np.zeros_like(t1)
        if self.kind == "flat":
            force = np.full_like(t1, c[0])
            return Pieces(np.exp(-force * t1), force, zero)
        if self.kind == "spot":
            k, slope, inside = self._spot_interval(mid)
            edge = np.where(mid < self._t[0], c[0], c[-1])
            s = np.where(inside, slope, 0.0)
            base = np.where(inside, c[k], edge)
            lead = np.where(inside, self._t[k], 0.0)
            log_factor = t1 * (base + s * (t1 - lead))
            force = base + s * (2.0 * t1 - lead + length)
            return Pieces(np.exp(-log_factor), force, s)
        b = self._band(mid)
        force = c[b]
        if self.kind == "segments":
            return Pieces(np.exp(-force * t1), force, zero)
        return Pieces(np.exp(-(self._acc[b] + force * (t1 - self._start[b]))), force, zero)

    def gauss_rule(self, t1, length, *, order: int = 12, decay=0.0, pole=np.inf,
                   correction: bool = False) -> Rule:
        """Return a Gauss-Legendre rule for integral_{t1}^{t1+length} g(t) D(t) dt per piece.

        Parameters
        ----------
        t1, length : float arrays (broadcast), the pieces; they must not straddle
            :meth:`nodes` nor a point where g changes formula.
        order : Gauss-Legendre points per sub-piece, one of ``RULE_REACH`` (8, 12, 16).
        decay : the largest rate of an exponential factor of g in each piece: -ln p summed
            over the lives under a constant force of mortality; 0 where g is a polynomial in t
            (UDD survival, one or two lives), which the rule integrates exactly anyway.
        pole : distance from each piece's start back to the nearest singularity of g
            (``inf`` if none; (p + q r) / q for Balducci survival).
        correction : weights for D(t) - factor exp(-force h) (see :meth:`pieces`) instead of
            D(t): what the closed form at the chord force leaves out. Only curved pieces
            (curvature != 0) get points; the others need no correction.

        Returns
        -------
        Rule
            Flat arrays ``piece`` (index into the raveled pieces), ``time`` and ``weight``:
            sum over the points of a piece of weight x g(time) is its integral.

        Notes
        -----
        Each piece is split so that Gauss-Legendre reproduces the integrand to rounding:
        first geometrically away from a pole (each sub-piece at most a quarter of its distance
        from it, so the Bernstein-ellipse error bound of the rule is below 1e-20), then evenly
        so that (|force| + |curvature| length + decay) x sub-piece length stays within
        ``RULE_REACH[order]``, the exponent variation up to which the rule was measured exact
        to 2e-14 relative or better. With ``correction`` the integrand is g D times
        expm1(-curvature h (h - length)), of relative size |curvature| length^2 / 4 at most,
        so the correction's own relative error hardly reaches the value.
        """
        if order not in RULE_REACH:
            raise ValueError(f"order must be one of {sorted(RULE_REACH)}")
        t1, length, decay, pole = (np.ravel(a) for a in np.broadcast_arrays(
            np.asarray(t1, dtype=float), np.asarray(length, dtype=float),
            np.asarray(decay, dtype=float), np.asarray(pole, dtype=float)))
        pc = self.pieces(t1, length)
        keep = length > 0
        if correction:
            keep &= pc.curvature != 0
        idx = np.flatnonzero(keep)
        # Stage 1: geometric sub-pieces near a pole: boundaries pole + rho g^j, g = 1 + 1/4.
        rho = pole[idx]
        if np.any(rho <= 0):
            raise ValueError("a pole must lie before the piece's start (distance > 0)")
        near = np.isfinite(rho) & (rho < length[idx] / _POLE_FRACTION)
        growth = 1.0 + _POLE_FRACTION
        with np.errstate(divide="ignore", invalid="ignore"):
            steps = np.where(near, np.ceil(np.log1p(length[idx] / np.where(near, rho, 1.0))
                                           / math.log(growth)), 1.0)
        steps = np.maximum(steps, 1).astype(np.int64)
        sub, j = _expand(idx, steps)
        rho_s = pole[sub]
        near_s = np.repeat(near, steps)
        safe_rho = np.where(near_s, rho_s, 1.0)
        lo = np.where(near_s, safe_rho * growth**j - safe_rho, 0.0)
        hi = np.where(near_s, safe_rho * growth ** (j + 1) - safe_rho, length[sub])
        lo = np.minimum(lo, length[sub])
        hi = np.minimum(hi, length[sub])
        # Stage 2: even parts by the exponent's variation.
        span = hi - lo
        rate = np.abs(pc.force[sub]) + np.abs(pc.curvature[sub]) * length[sub] + decay[sub]
        parts = np.maximum(np.ceil(rate * span / RULE_REACH[order]), 1).astype(np.int64)
        piece, part = _expand(sub, parts)
        ell = np.repeat(span / parts, parts)
        a = np.repeat(lo, parts) + part * ell
        x, w = _LEGENDRE[order]
        h = a[:, None] + ell[:, None] * x
        weight = ell[:, None] * w
        base = t1[piece][:, None]
        if correction:
            full = length[piece][:, None]
            weight = weight * (pc.factor[piece][:, None] * np.exp(-pc.force[piece][:, None] * h)
                               * np.expm1(-pc.curvature[piece][:, None] * h * (h - full)))
        else:
            weight = weight * self.discount(base + h)
        return Rule(np.repeat(piece, order), np.ravel(base + h), np.ravel(weight))


def _expand(owner, counts):
    """Return (owner repeated counts times, 0..count-1 within each owner)."""
    own = np.repeat(owner, counts)
    firsts = np.cumsum(counts) - counts
    j = np.arange(own.size) - np.repeat(firsts, counts)
    return own, j


def _legendre(order: int):
    x, w = np.polynomial.legendre.leggauss(order)
    return _readonly((x + 1.0) / 2.0), _readonly(w / 2.0)


_LEGENDRE = {n: _legendre(n) for n in RULE_REACH}


@lru_cache(maxsize=16)
def method_words(kind: str, curved: bool) -> MappingProxyType:
    """How discount factors and continuous integrals are computed for a structure of ``kind``
    (``curved``: a spot curve that moves, see :attr:`Curve.curved`), in words (read-only)."""
    discounting = {
        "flat": "(1 + i)^-t",
        "spot": "exp(-t r(t)), r the continuously compounded spot rate, linear in t between "
                "the terms and flat outside them",
        "segments": "(1 + s)^-t, s the rate of the band in which the time t falls",
        "forward": "product over the bands of (1 + f)^-(years of [0, t] in the band)",
    }[kind]
    continuous = "closed form per piece at the piece's constant force of interest"
    if kind != "flat":
        continuous += ", pieces cut at " + ("the curve's terms" if kind == "spot"
                                            else "the band edges")
    if curved:
        continuous += ("; between two terms t r(t) is quadratic in t, so the closed form "
                       "is taken at the chord force and the rest, "
                       "D(t) - chord exp(-force h), is integrated by a Gauss-Legendre "
                       "rule exact to rounding")
    return MappingProxyType({"discounting": discounting, "continuous": continuous})
