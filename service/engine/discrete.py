"""Discrete payments: every payment date summed (:func:`_points`), the guaranteed years in
closed form under a constant force of interest, and whole years by Woolhouse's formula."""

import math
from dataclasses import dataclass

import numpy as np

from service.engine.batch import _Batch, _chunks, _expand, _on_time, _payment_count
from service.engine.curves import Curve
from service.engine.interest import annuity_certain
from service.engine.items import _EPS


@dataclass(frozen=True, eq=False)
class PaymentPoints:
    """Every evaluated payment date of a set of items, flat."""

    owner: np.ndarray
    time: np.ndarray
    amount: np.ndarray  # instalment per 1 p.a., escalation included
    probability: np.ndarray  # expected fraction of the instalment that is paid
    discount: np.ndarray
    both: np.ndarray
    first_only: np.ndarray
    second_only: np.ndarray

    @property
    def present_value(self):
        return self.amount * self.probability * self.discount


def _points(batch: _Batch, own, j, curve: Curve) -> PaymentPoints:
    m = batch.m[own]
    t = batch.deferral[own] + (j + batch.arrears[own]) / m
    amount = np.exp((j // m) * batch.growth[own]) / m
    both, one, two = batch.state_probabilities(own, t)
    life = batch.weight(own, both, one, two)
    certain = j < batch.guaranteed[own]
    probability = np.where(certain, batch.certain_weight[own], life)
    return PaymentPoints(own, t, amount, probability, curve.discount(t), both, one, two)


def _guaranteed_values(batch: _Batch, which: np.ndarray, delta: float):
    """Present value of the guaranteed payments, in closed form year by year, under one
    constant force of interest ``delta`` (other structures sum the dates).

    Year k of the guarantee holds n_k payments of (1 + r)^k / m, certain once some life is
    alive at the deferral u: its value is P (1 + r)^k v^(u + k) times the annuity-certain of
    n_k / m years payable m-thly (in advance or in arrears).
    """
    count = batch.guaranteed[which]
    years = -(-count // batch.m[which])  # whole or part years of the guarantee
    loc, k = _expand(np.arange(which.size), np.zeros(which.size, dtype=np.int64), years)
    own = which[loc]
    m = batch.m[own]
    payments = np.minimum(m, count[loc] - k * m)
    year = annuity_certain(math.expm1(delta), payments / m, m=m, advance=~batch.arrears[own])
    pv = (batch.certain_weight[own] * np.exp(k * batch.growth[own])
          * np.exp(-delta * (batch.deferral[own] + k)) * year)
    # (bincount of nothing is an integer array)
    return np.bincount(loc, weights=pv, minlength=which.size).astype(float)


def _discrete_values(batch: _Batch, which: np.ndarray, curve: Curve, approximation: str,
                     deadline: float | None = None):
    """Return the values of the discrete items ``which`` and whether Woolhouse valued any
    year of each."""
    count = _payment_count(batch)[which]
    delta = curve.constant_force
    if delta is None:
        # No closed form for the guaranteed years: their dates are summed like the others.
        values = np.zeros(which.size)
        first = np.zeros(which.size, dtype=np.int64)
        guaranteed = np.minimum(batch.guaranteed[which], count)
    else:
        values = np.zeros(which.size)
        first = guaranteed = np.minimum(batch.guaranteed[which], count)
        # One closed form per year of a guarantee, in chunks of years to bound memory.
        for part in _chunks(-(-batch.guaranteed[which] // batch.m[which])):
            _on_time(deadline)
            values[part] = _guaranteed_values(batch, which[part], delta)
    m = batch.m[which]
    local = np.arange(which.size)
    k0, k1 = _woolhouse_years(batch, which, approximation)
    head_stop = np.maximum(np.minimum(k0 * m, count), guaranteed)
    tail_start = np.maximum(k1 * m, head_stop)
    # Ranges of payments summed exactly: before and after the Woolhouse years, and the
    # Woolhouse years whose formula left its bounds.
    owner, lo, hi = [local, local], [first, tail_start], [head_stop, count]
    used = np.zeros(which.size, dtype=bool)
    # Woolhouse years, in chunks of years to bound memory.
    for part in _chunks(np.maximum(k1 - k0, 0)) if (k1 > k0).any() else ():
        _on_time(deadline)
        loc, k, block, ok = _woolhouse_blocks(batch, which, local[part], k0[part], k1[part],
                                              curve, approximation)
        values += np.bincount(loc[ok], weights=block[ok], minlength=which.size)
        used[loc[ok & (block > 0)]] = True  # a year no one can reach tells nothing
        bad = ~ok
        owner.append(loc[bad])
        lo.append(k[bad] * m[loc[bad]])
        hi.append(np.minimum((k[bad] + 1) * m[loc[bad]], count[loc[bad]]))
    owner, lo, hi = np.concatenate(owner), np.concatenate(lo), np.concatenate(hi)
    for part in _chunks(np.maximum(hi - lo, 0)):
        _on_time(deadline)
        o, j = _expand(owner[part], lo[part], hi[part])
        pts = _points(batch, which[o], j, curve)
        values += np.bincount(o, weights=pts.present_value, minlength=which.size)
    return values, used


def _woolhouse_years(batch: _Batch, which: np.ndarray, approximation: str):
    """Return [k0, k1): the whole life-contingent years of each window valued by Woolhouse.

    Empty (k1 = k0) for exact summation and for annual payments; the guarantee and any part
    year at either end are summed exactly.
    """
    m = batch.m[which]
    term = batch.term[which]
    k0 = np.ceil(batch.guarantee[which] - _EPS).astype(np.int64)
    whole_life_years = np.ceil(np.maximum(batch.horizon[which] - batch.deferral[which], 0))
    k1 = np.where(np.isfinite(term), np.floor(np.where(np.isfinite(term), term, 0) + _EPS),
                  whole_life_years).astype(np.int64)
    woolhouse = (approximation != "exact") & (m > 1)
    return k0, np.where(woolhouse, np.maximum(k1, k0), k0)


def _woolhouse_blocks(batch, which, local, k0, k1, curve: Curve, approximation):
    """Value whole life-contingent years of the window by Woolhouse's formula.

    For f(t) = D(t) W(t), D the discount factor and W the expected fraction payable, one year
    [k, k + 1) paid m-thly in advance is approximately f(k) - (m-1)/(2m) (f(k) - f(k+1))
    + (m^2-1)/(12 m^2) (f'(k) - f'(k+1)) (the last term for the three-term form), with
    f'(t) = D(t) W'(t) - F(t) f(t), F the forward force of interest; in arrears add
    (f(k+1) - f(k)) / m. At a flat rate these telescope over a whole life to the textbook
    a-due^(m) = a-due - (m-1)/(2m) - (m^2-1)/(12 m^2) (delta + mu).

    Returns ``(loc, k, block, ok)``: for each year k of each item ``loc``, its Woolhouse value
    and whether that value lies between 0 and the same formula's value for the year's
    payments made for certain at the largest amount. Where the force of mortality is very
    high (near the end of a table) the third term leaves those bounds; a year at whose end
    the status has failed for certain, and under segment rates a year across a band edge,
    are not smooth enough for the formula either. The caller sums such years exactly.
    """
    loc, k = _expand(local, k0, k1)
    own = which[loc]
    m = batch.m[own].astype(float)
    t0 = batch.deferral[own] + k
    t1 = t0 + 1.0
    v0, v1 = curve.discount(t0), curve.discount(t1)
    f0 = v0 * batch.life_weight(own, t0)
    f1 = v1 * batch.life_weight(own, t1)
    a = (m - 1) / (2 * m)
    block = f0 - a * (f0 - f1)
    # The same formula for the year's payments made for certain: no value of the year can
    # exceed it at the largest amount (the two-term form never does; the third term, with a
    # very high force of mortality, can).
    bound = v0 - a * (v0 - v1)
    if approximation == "woolhouse-3":
        b = (m * m - 1) / (12 * m * m)
        # The year's own forces: at its end the limit from inside the year (a forward band
        # or a spot term may change the force exactly there).
        force0 = curve.forward_force(t0)
        force1 = curve.forward_force(np.nextafter(t1, -np.inf))
        with np.errstate(invalid="ignore"):
            g0 = v0 * batch.life_weight_slope(own, t0) - force0 * f0
            g1 = v1 * batch.life_weight_slope(own, t1) - force1 * f1
            block = block + b * (g0 - g1)
        bound = bound + b * (force1 * v1 - force0 * v0)
    arrears = batch.arrears[own]
    block = np.where(arrears, block + (f1 - f0) / m, block)
    bound = batch.amounts[own].max(axis=1) * np.where(arrears, bound + (v1 - v0) / m, bound)
    ok = (block >= 0) & (block <= bound * (1 + 1e-12))  # False for NaN
    # A year at whose end every life is dead for certain (q = 1 within it) is far from the
    # smooth curve the formula assumes.
    ok &= ~((f1 == 0) & (f0 > 0))
    if curve.kind == "segments" and curve.nodes().size:
        # The discount jumps at a band edge: a year with an edge after its start (its end
        # included, where f(t1) would take the next band's rate) is summed exactly.
        edges = curve.nodes()
        nxt = np.searchsorted(edges, t0, side="right")
        ok &= ~((nxt < edges.size) & (edges[np.minimum(nxt, edges.size - 1)] <= t1))
    growth = np.exp(k * batch.growth[own])
    return loc, k, block * growth, ok
