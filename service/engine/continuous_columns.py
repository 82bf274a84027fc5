"""Single-life continuous annuities valued from columns, on shared chains of survival.

:mod:`service.engine.columns` sends the continuous items (timing code 2) of a batch here
under a flat rate; the results are those of the general path (:mod:`~service.engine.continuous`,
segment by segment) to rounding, and their method code is the general path's INTEGRAL.

Derivation (flat force of interest delta; escalation r, growth = ln(1 + r); rho = 1 / (1 + r))
--------------------------------------------------------------------------------------------
A life aged x = a + f (a its integer age, 0 <= f < 1, snapped as the general path's ages)
has the chain C_K = prod_(j<K) (1 - q(a + j)) (see :mod:`service.engine.columns`) and
survives t years with probability S(f + t) / S(f), S(K + h) = C_K h_p(a + K).

Payment runs at the rate (1 + r)^floor(t - u) from the deferral u to the end of the term,
made certain for the guarantee's g years once the life is alive at u (as the general path:
P(alive at u) times the annuity-certain), and life-contingent after u + g. In the age
offset s = f + t, the window's years start at s = c + j with c = f + u = C + gamma
(C = floor(c)); so within the year of age K (s = K + h, 0 <= h < 1) the rate is
(1 + r)^(K - C - 1) for h < gamma and (1 + r)^(K - C) after: a year of age has two parts,
split at the same gamma in every year. With w = e^-delta (1 + r) and
kappa = e^(delta f) (1 + r)^(-C), the payments over h in [h0, h1] of year K are worth

    w^K kappa int_(h0)^(h1) e^(-delta h) rho^[h < gamma] S(K + h) dh        (all over S(f)).

Under UDD S(K + h) = (1 - h) C_K + h C_(K+1), so that is w^K (A C_K + B C_(K+1)) with

    A = kappa [rho I(1 - h; h0, min(h1, gamma)) + I(1 - h; max(h0, gamma), h1)],
    B = kappa [rho I(h; ...) + I(h; ...)]                   (parts of zero length count 0),

I(p(h); a, b) = int_a^b p(h) e^(-delta h) dh, in closed form with the series of
:func:`service.engine.integrals.phi` for small arguments (so delta near 0 and negative rates
are exact to rounding): with L = b - a, I(1; a, b) = e^(-delta a) L phi_0(delta L) and
I(h; a, b) = e^(-delta a) (a L phi_0 + L^2 phi_1)(delta L); I(1 - h) is their difference,
a sum of non-negative parts that loses at most a bit or two.

The life-contingent window s in [f + u + g, f + min(u + n, horizon)] is a first year from
h0, a last year to h1 and whole years between, whose A and B are the same for every year
of an item: they contribute A M0 + B M1, M0 = sum w^K C_K and M1 = sum w^K C_(K+1) over
those years, differences of cumulative columns of the chain with the discrete path's
fallback to direct sums where the difference would cancel
(:func:`service.engine.columns._whole_years`).

Under a constant force or Balducci's assumption S(K + h) is not linear in h: each year of
each item is integrated in its (up to) two parts by the general path's closed forms
(:mod:`service.engine.integrals`), a per-year pass vectorised over (item, year) pairs.

The guarantee is P(alive at u) e^(-delta u) [sum_(k<W) e^(-lambda k) abar(1) +
e^(-lambda W) abar(g - W)], W = floor(g), lambda = delta - growth, abar(L) = L phi_0(delta L),
the geometric sum W phi_0(W lambda) / phi_0(lambda) in closed form.
"""

import numpy as np

from service.engine import integrals
from service.engine.batch import _expand, _on_time
from service.engine.integrals import phi
from service.engine.survival import by_assumption, fraction_survival

_SNAP = 1e-9  # as service.engine.survival
#: Items valued at once (their chains are built per chunk).
_CHUNK_ITEMS = 16_384
#: The closed-form integral over a part of a year of age, by assumption (as the general path).
_SINGLE = {"udd": integrals.udd, "constant-force": integrals.constant_force,
           "balducci": integrals.balducci}


def value(tables, cols, delta: float, assumption: str, deadline) -> np.ndarray:
    """Values of validated single-life continuous items ``cols`` (a
    :class:`~service.engine.columns.Columns`) under the flat force of interest ``delta``."""
    from service.engine.columns import _select_key  # (columns imports this module lazily)

    n = len(cols)
    values = np.zeros(n)
    if not n:
        return values
    ages = cols.age + cols.age_adjustment
    anchor = np.floor(ages + _SNAP).astype(np.int64)
    dkey = _select_key(tables, cols.table, cols.duration)
    growth = np.log1p(cols.escalation)
    order = np.lexsort((growth, anchor, cols.flat_extra, cols.mortality_multiplier, dkey,
                        cols.table))
    for start in range(0, n, _CHUNK_ITEMS):
        _on_time(deadline)
        idx = order[start:start + _CHUNK_ITEMS]
        values[idx] = _value_chunk(tables, cols, idx, ages[idx], anchor[idx], dkey[idx],
                                   growth[idx], delta, assumption)
    return values


def work(tables, cols, assumption: str) -> np.ndarray:
    """Work units: one an item under UDD (a few sums on shared columns); under the other
    assumptions what the general path prices for the same item's segments
    (service.engine.batch._work), which the per-year pass does not exceed."""
    from service.engine.batch import _SEGMENT_COST

    if assumption == "udd":
        return np.ones(len(cols), dtype=np.int64)
    ages = cols.age + cols.age_adjustment
    last = np.array([tb.last_age for tb in tables], dtype=float)[cols.table]
    horizon = last + 1.0 - ages
    u, g = cols.deferral, cols.guarantee
    end = np.minimum(u + cols.term, np.maximum(u + g, horizon))
    span = np.maximum(end - u, 0)
    segments = 3 * np.ceil(span + 2).astype(np.int64)
    return segments * _SEGMENT_COST[(assumption, 1)]


def _chains(tables, t, dkey, mult, extra, anchor, growth):
    """Consecutive items (sorted by key) with the same key share one chain: return each
    item's chain, the representative items, the chains' rates q (from the integer age,
    q = 1 from the table's last age) and survival cum (C_0 = 1 .. C_width)."""
    from service.engine.columns import _year_rates

    size = t.size
    new = np.zeros(size, dtype=bool)
    new[0] = True
    for key in (t, dkey, mult, extra, anchor, growth):
        new[1:] |= key[1:] != key[:-1]
    chain = np.cumsum(new) - 1
    rep = np.flatnonzero(new)
    last = np.array([tb.last_age for tb in tables])
    width = int((last[t[rep]] - anchor[rep]).max()) + 3
    k = np.arange(width)[None, :]
    q = _year_rates(tables, t[rep][:, None], anchor[rep][:, None], dkey[rep][:, None],
                    mult[rep][:, None], extra[rep][:, None], k)
    cum = np.ones((rep.size, width + 1))
    cum[:, 1:] = np.cumprod(1.0 - q, axis=1)
    return chain, rep, q, cum


def _value_chunk(tables, cols, idx, ages, anchor, dkey, growth, delta, assumption):
    from service.engine.columns import _whole_years

    t = cols.table[idx]
    chain, rep, q, cum = _chains(tables, t, dkey, cols.mortality_multiplier[idx],
                                 cols.flat_extra[idx], anchor, growth)
    width = q.shape[1]
    frac = np.maximum(ages - anchor, 0.0)
    start = fraction_survival(q[chain, 0], frac, assumption)
    last = np.array([tb.last_age for tb in tables], dtype=float)[t]
    u, g = cols.deferral[idx], cols.guarantee[idx]
    horizon = last + 1.0 - (anchor + frac)

    # The guarantee: P(alive at u) times the annuity-certain of its g years.
    values = np.zeros(idx.size)
    has_g = g > 0
    if has_g.any():
        s = frac + u
        ku = np.floor(s + _SNAP)
        ru = np.clip(s - ku, 0.0, 1.0)
        ku = np.clip(ku, 0, width).astype(np.intp)
        alive = cum[chain, ku] * fraction_survival(q[chain, np.minimum(ku, width - 1)], ru,
                                                   assumption) / start
        whole = np.floor(g)
        part = g - whole
        lam = delta - growth
        one = phi(0, np.full(idx.size, delta))  # abar(1)
        years = whole * phi(0, whole * lam) / phi(0, lam) * one
        tail = np.exp(-lam * whole) * part * phi(0, delta * part)
        values += np.where(has_g, alive * np.exp(-delta * u) * (years + tail), 0.0)

    # The life-contingent window, in age offsets s0 .. s1.
    t0 = u + g
    t1 = np.minimum(u + cols.term[idx], horizon)
    live = t1 > t0
    if not live.any():
        return values
    s0 = np.where(live, frac + t0, 0.0)
    s1 = np.where(live, frac + t1, 0.5)
    ka = np.floor(s0).astype(np.int64)
    kb = np.minimum(np.ceil(s1).astype(np.int64) - 1, width - 1)
    kb = np.maximum(kb, ka)
    h0 = s0 - ka
    h1 = np.clip(s1 - kb, 0.0, 1.0)
    c = frac + u
    big_c = np.floor(c)
    gamma = c - big_c
    kappa = np.exp(delta * frac - big_c * growth)
    rho = np.exp(-growth)
    lw = growth - delta  # ln w
    if assumption == "udd":
        weights = _Weights(delta, gamma, rho, kappa)
        cum2 = np.concatenate([cum, np.zeros((rep.size, 1))], axis=1)  # C up to width + 1
        life = np.zeros(idx.size)
        zero, full = np.zeros(idx.size), np.ones(idx.size)
        a1, b1 = weights(h0, np.where(kb == ka, h1, 1.0))
        life += np.exp(ka * lw) * (a1 * cum2[chain, ka] + b1 * cum2[chain, ka + 1])
        two = live & (kb > ka)
        if two.any():
            a2, b2 = weights(zero, h1)
            life += np.where(two, np.exp(kb * lw) * (a2 * cum2[chain, kb]
                                                     + b2 * cum2[chain, kb + 1]), 0.0)
        mid = live & (kb > ka + 1)
        if mid.any():
            af, bf = weights(zero, full)
            life += _whole_years(cum2, chain, lw, growth, delta, rep, ka, kb, af, bf, mid)
    else:
        life = _per_year(q, cum, chain, lw, ka, kb, h0, h1, gamma, rho, kappa, delta,
                         assumption, live)
    values += np.where(live, life / start, 0.0)
    return values


class _Weights:
    """A and B of a part [h0, h1] of a year of age (see the module's derivation)."""

    def __init__(self, delta, gamma, rho, kappa):
        self.delta, self.gamma, self.rho, self.kappa = delta, gamma, rho, kappa

    def _moments(self, a, b):
        """(I(1 - h; a, b), I(h; a, b)), zero where b <= a."""
        length = np.maximum(b - a, 0.0)
        x = self.delta * length
        p0 = length * phi(0, x)
        p1 = length * length * phi(1, x)
        lead = np.exp(-self.delta * a)
        upper = lead * (a * p0 + p1)
        return lead * p0 - upper, upper

    def __call__(self, h0, h1):
        g = self.gamma
        in_a, in_b = self._moments(np.minimum(h0, g), np.minimum(h1, g))
        out_a, out_b = self._moments(np.maximum(h0, g), np.maximum(h1, g))
        return (self.kappa * (self.rho * in_a + out_a),
                self.kappa * (self.rho * in_b + out_b))


#: (item, year) pairs integrated at once by the per-year pass.
_CHUNK_PAIRS = 200_000


def _per_year(q, cum, chain, lw, ka, kb, h0, h1, gamma, rho, kappa, delta, assumption, live):
    """Life-contingent values of ``live`` items integrated year by year (any assumption):
    each year of age in its two parts, by the general path's closed forms."""
    single = by_assumption(_SINGLE, assumption)
    size = chain.size
    out = np.zeros(size)
    items = np.flatnonzero(live)
    cost = kb[items] - ka[items] + 1
    total = np.cumsum(cost)
    begin = 0
    while begin < items.size:
        base = total[begin - 1] if begin else 0
        stop = max(int(np.searchsorted(total, base + _CHUNK_PAIRS, side="right")), begin + 1)
        sel = items[begin:stop]
        begin = stop
        own, k = _expand(sel, ka[sel], kb[sel] + 1)
        lo = np.where(k == ka[own], h0[own], 0.0)
        hi = np.where(k == kb[own], h1[own], 1.0)
        ch = chain[own]
        qk = q[ch, k]
        g = gamma[own]
        acc = np.zeros(own.size)
        for a, b, weight in ((np.minimum(lo, g), np.minimum(hi, g), rho[own]),
                             (np.maximum(lo, g), np.maximum(hi, g), 1.0)):
            length = np.maximum(b - a, 0.0)
            with np.errstate(divide="ignore", invalid="ignore"):
                part = single(qk, a, delta, length)
            acc += np.where(length > 0, weight * np.exp(-delta * a) * part, 0.0)
        term = np.exp(k * lw[own]) * kappa[own] * cum[ch, k] * acc
        out += np.bincount(own, weights=term, minlength=size)
    return out

