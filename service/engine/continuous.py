"""Continuous payments: windows cut into segments within which nothing changes its formula,
each integrated in closed form per year of age (or by a Gauss-Legendre rule)."""

from dataclasses import dataclass

import numpy as np

from service.engine import integrals
from service.engine.batch import _Batch, _chunks, _expand, _on_time, _window_end, _work
from service.engine.curves import Curve
from service.engine.survival import by_assumption

#: No discounting: for undiscounted expected amounts.
_UNDISCOUNTED = Curve.flat(0.0)


@dataclass(frozen=True, eq=False)
class Segments:
    """Pieces of the continuous payment windows within which nothing changes its formula."""

    owner: np.ndarray
    year: np.ndarray  # year of the window, for escalation and schedules
    present_value: np.ndarray
    expected_amount: np.ndarray | None


def _grid(owner, base, step_from, step_to):
    """Times base + k for integer k in [step_from, step_to) per owner."""
    o, k = _expand(owner, step_from, step_to)
    return o, base[o] + k


@dataclass(frozen=True, eq=False)
class _Cut:
    """The segments of a set of windows: piece i is [t1, t1 + length] of item ``own``."""

    owner: np.ndarray  # local index into the items cut
    own: np.ndarray  # batch index
    t1: np.ndarray
    length: np.ndarray
    mid: np.ndarray
    year: np.ndarray  # year of the window, for escalation and schedules
    certain: np.ndarray
    growth: np.ndarray  # (1 + r)^year


def _cut(batch: _Batch, which: np.ndarray, curve: Curve, *, per_year: int = 1) -> _Cut:
    """Cut the windows of ``which`` at whole ages, window years, the guarantee's end and the
    interest structure's nodes, so that nothing changes its formula within a segment
    (``per_year``: also at every 1/per_year of a year from now, for buckets of time)."""
    u = batch.deferral[which]
    end = _window_end(batch, which)
    local = np.arange(which.size)
    span = np.maximum(np.ceil(end - u), 0).astype(np.int64)
    pieces = [_grid(local, u, np.zeros_like(span), span + 1),
              (local, u + batch.guarantee[which]), (local, end)]
    if per_year > 1:
        o, k = _expand(local, np.floor(u * per_year).astype(np.int64),
                       np.ceil(end * per_year).astype(np.int64) + 1)
        pieces.append((o, k / per_year))
    nodes = curve.nodes()
    if nodes.size:
        pieces.append((np.repeat(local, nodes.size), np.tile(nodes, local.size)))
    for life in (batch.first[which], batch.second[which]):
        present = life >= 0
        frac = np.where(present, batch.lives.frac[np.maximum(life, 0)], 0.0)
        lo = np.where(present, np.floor(u + frac), 0).astype(np.int64)
        hi = np.where(present, np.ceil(end + frac) + 1, 0).astype(np.int64)
        pieces.append(_grid(local, -frac, lo, hi))
    owner = np.concatenate([p[0] for p in pieces])
    times = np.concatenate([p[1] for p in pieces])
    times = np.clip(times, u[owner], end[owner])
    order = np.lexsort((times, owner))
    owner, times = owner[order], times[order]
    keep = (owner[1:] == owner[:-1]) & (times[1:] - times[:-1] > 1e-12)
    seg_owner = owner[:-1][keep]
    t1 = times[:-1][keep]
    length = times[1:][keep] - t1
    own = which[seg_owner]
    mid = t1 + length / 2
    year = np.floor(mid - batch.deferral[own]).astype(np.int64)
    certain = mid < batch.deferral[own] + batch.guarantee[own]
    return _Cut(seg_owner, own, t1, length, mid, year, certain,
                np.exp(year * batch.growth[own]))


def _segments(batch: _Batch, which: np.ndarray, curve: Curve, *,
              expected: bool = False) -> Segments:
    """Cut the windows of ``which`` into segments and integrate each (``expected``: also
    the undiscounted expected amount, for schedules)."""
    cut = _cut(batch, which, curve)
    pv = _segment_integral(batch, cut, curve)
    undiscounted = (cut.growth * _segment_integral(batch, cut, _UNDISCOUNTED)
                    if expected else None)
    return Segments(cut.owner, cut.year, cut.growth * pv, undiscounted)


def _life_part(batch, life, t1, mid):
    lives = batch.lives
    k = np.floor(lives.frac[life] + mid).astype(np.int64)
    r = np.clip(lives.frac[life] + t1 - k, 0.0, 1.0)
    return lives.year_rate(life, k), r, lives.year_start(life, k)


def _weight_in(batch, cut: _Cut, piece, t):
    """The integrand without discount at times ``t`` in pieces ``piece``: the certain weight
    in the guarantee, else the expected fraction payable."""
    own = cut.own[piece]
    return np.where(cut.certain[piece], batch.certain_weight[own], batch.life_weight(own, t))


def _decay_shape(decay, pole, q, alive):
    return decay + np.where(alive, -np.log1p(-np.where(alive, q, 0.0)), 0.0), pole


def _pole_shape(decay, pole, q, r, alive):
    with np.errstate(divide="ignore"):
        far = np.where(alive & (q > 0), (1 - q + q * r) / np.where(q > 0, q, 1.0), np.inf)
    return decay, np.minimum(pole, far)


#: How one life's rates within a piece shape its survival there, by assumption.
_RULE_SHAPES = {"udd": lambda decay, pole, q, r, alive: (decay, pole),
                "constant-force": lambda decay, pole, q, r, alive: _decay_shape(decay, pole, q,
                                                                               alive),
                "balducci": _pole_shape}


def _rule_shape(assumption, rates):
    """(decay, pole) of the survival within each piece, for :meth:`Curve.gauss_rule`.

    Under a constant force survival decays at -ln p per life; Balducci's survival has a pole
    (p + q r) / q before the piece's start; UDD's is a polynomial.
    """
    shape = by_assumption(_RULE_SHAPES, assumption)
    decay, pole = 0.0, np.inf
    for q, r in rates:
        decay, pole = shape(decay, pole, q, r, q < 1)
    return decay, pole


def _cut_rule(batch, cut: _Cut, curve: Curve, *, order: int = 12):
    """A Gauss-Legendre rule for integral g D over each segment of ``cut`` (see
    :meth:`Curve.gauss_rule`), shaped by the lives' survival within it."""
    q1, r1, _ = _life_part(batch, batch.first[cut.own], cut.t1, cut.mid)
    rates = [(q1, r1)]
    has2 = batch.second[cut.own] >= 0
    if has2.any():
        q2, r2, _ = _life_part(batch, np.maximum(batch.second[cut.own], 0), cut.t1, cut.mid)
        rates.append((np.where(has2, q2, 0.0), r2))
    decay, pole = _rule_shape(batch.lives.assumption, rates)
    return curve.gauss_rule(cut.t1, cut.length, order=order, decay=decay, pole=pole)


def _segment_integral(batch, cut: _Cut, curve: Curve, pc=None):
    """Integrate payment rate x discount x survival over each segment, before escalation.

    Within a segment the discount is D(t1 + h) = factor exp(-force h - curvature h (h - D));
    the closed forms of integrals.py are taken at that force, and on a moving spot curve
    (curvature not 0) the rest is added by a Gauss-Legendre rule exact to rounding.
    """
    own, t1, length, mid, certain = cut.own, cut.t1, cut.length, cut.mid, cut.certain
    pc = curve.pieces(t1, length) if pc is None else pc  # (the caller's, when it has them)
    force = pc.force
    assumption = batch.lives.assumption
    q1, r1, s1 = _life_part(batch, batch.first[own], t1, mid)
    j1 = _single(assumption, q1, r1, force, length) * s1
    has2 = batch.second[own] >= 0
    j2 = np.zeros_like(j1)
    j12 = np.zeros_like(j1)
    rates = [(q1, r1)]
    if has2.any():
        q2, r2, s2 = _life_part(batch, np.maximum(batch.second[own], 0), t1, mid)
        j2 = np.where(has2, _single(assumption, q2, r2, force, length) * s2, 0.0)
        j12 = np.where(has2, _pair(assumption, q1, r1, q2, r2, force, length) * s1 * s2, 0.0)
        rates.append((np.where(has2, q2, 0.0), r2))
    a = batch.amounts[own]
    reach = batch.reach[own]
    life = ((a[:, 0] - a[:, 1] - a[:, 2]) * j12 + a[:, 1] * reach[:, 0] * j1
            + a[:, 2] * reach[:, 1] * j2)
    if certain.any():
        sure = batch.certain_weight[own] * integrals.certain(force, length)
        life = np.where(certain, sure, life)
    value = pc.factor * life
    if curve.curved:
        decay, pole = _rule_shape(assumption, rates)
        rule = curve.gauss_rule(t1, length, order=8, correction=True, decay=decay, pole=pole)
        g = _weight_in(batch, cut, rule.piece, rule.time)
        value = value + np.bincount(rule.piece, weights=rule.weight * g, minlength=t1.size)
    return value


#: The closed-form integral over a piece for one life, and for two, by assumption.
_SINGLE = {"udd": integrals.udd, "constant-force": integrals.constant_force,
           "balducci": integrals.balducci}
_PAIR = {"udd": integrals.udd_pair,
         "constant-force": lambda q1, r1, q2, r2, delta, length: integrals.constant_force(
             q1, r1, delta, length, q2, r2),
         "balducci": integrals.balducci_pair}


def _single(assumption, q, r, delta, length):
    return by_assumption(_SINGLE, assumption)(q, r, delta, length)


def _pair(assumption, q1, r1, q2, r2, delta, length):
    return by_assumption(_PAIR, assumption)(q1, r1, q2, r2, delta, length)


def _continuous_values(batch: _Batch, which: np.ndarray, curve: Curve,
                       deadline: float | None = None):
    values = np.zeros(which.size)
    for part in _chunks(_work(batch, curve)[which]):
        _on_time(deadline)
        seg = _segments(batch, which[part], curve)
        values[part] += np.bincount(seg.owner, weights=seg.present_value, minlength=part.size)
    return values
