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
are exact to rounding): with L = b - a and phi_n at delta L,
I(h; a, b) = e^(-delta a) L (a phi_0 + L phi_1) and
I(1 - h; a, b) = e^(-delta a) L ((1 - b + L) phi_0 - L phi_1). Ages are carried as a sum of
two doubles (the rounding error of f + t kept), so that a short part, at the start of the
window say, keeps its length and its distance 1 - b from the end of the year to rounding
of themselves.

The life-contingent window s in [f + u + g, f + min(u + n, horizon)] is a first year from
h0, a last year to h1 and whole years between, whose A and B are the same for every year
of an item: they contribute A M0 + B M1, M0 = sum w^K C_K and M1 = sum w^K C_(K+1) over
those years, differences of cumulative columns of the chain with the discrete path's
fallback to direct sums where the difference would cancel
(:func:`service.engine.columns._whole_years`).

Under a constant force or Balducci's assumption S(K + h) is not linear in h: each year of
each item is integrated in its (up to) two parts by the general path's closed forms
(:mod:`service.engine.integrals`), a per-year pass vectorised over (item, year) pairs.

Items the general path would value differently by more than rounding are left to it
(see :func:`_left_to_general`): a window with two cut points (whole ages, anniversaries of
the window, the ends of the guarantee and of the window) 1e-13 to 1.5e-12 years apart, from
between which the general path drops the sliver (in every year, where the window's
anniversaries fall that close to whole ages), and life-contingent parts shorter than 1e-3
years.

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


def value(tables, cols, valuation, deadline) -> np.ndarray:
    """Values of validated single-life continuous items ``cols`` (a
    :class:`~service.engine.columns.Columns`) under ``valuation``'s flat rate.

    Items whose window has cut points 1e-13 to 1.5e-12 years apart, or whose
    life-contingent part is shorter than 1e-3 years (see :func:`_left_to_general`), are
    valued by the general path itself."""
    from service.engine import annuity
    from service.engine.columns import _select_key  # (columns imports this module lazily)

    n = len(cols)
    values = np.zeros(n)
    if not n:
        return values
    odd = _left_to_general(tables, cols)
    if odd.any():
        values[odd] = annuity.value_annuities(tables, cols.take(odd).to_items(), valuation,
                                              deadline=deadline, fast=False).value
        if odd.all():
            return values
        keep = ~odd
        values[keep] = value(tables, cols.take(keep), valuation, deadline)
        return values
    delta = valuation.curve.constant_force
    assumption = valuation.fractional_age
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
    assumptions, and for the items left to the general path, what the general path prices
    for the item's segments (service.engine.batch._work), which the per-year pass does not
    exceed."""
    from service.engine.batch import _SEGMENT_COST

    frac, horizon = _ages(tables, cols)
    u, g = cols.deferral, cols.guarantee
    end = np.minimum(u + cols.term, np.maximum(u + g, horizon))
    span = np.maximum(end - u, 0)
    general = 3 * np.ceil(span + 2).astype(np.int64) * _SEGMENT_COST[(assumption, 1)]
    if assumption == "udd":
        return np.where(_left_to_general(tables, cols), general, 1)
    return general


#: Cut points of a window this far apart or closer are one point to the general path, which
#: drops the sliver between them (service.engine.continuous._cut: 1e-12, with a margin for
#: rounding); nearer than _SLIVER_NOISE, rounding's own slivers, the difference is below
#: 1e-13 of the value.
_SLIVER = 1.5e-12
_SLIVER_NOISE = 1e-13
#: A life-contingent part shorter than this is left to the general path: its length, taken
#: here as a difference of ages (an absolute error of about 1e-16), would lose more than
#: 1e-13 of itself.
_SHORT = 1e-3


def _ages(tables, cols):
    """Each life's fractional age (snapped as the general path's) and horizon (the time
    after which it is dead for certain)."""
    ages = cols.age + cols.age_adjustment
    anchor = np.floor(ages + _SNAP)
    frac = np.maximum(ages - anchor, 0.0)
    last = np.array([tb.last_age for tb in tables], dtype=float)[cols.table]
    return frac, last + 1.0 - (anchor + frac)


def _left_to_general(tables, cols) -> np.ndarray:
    """Items whose window has two cut points (whole ages, the window's anniversaries, the
    end of the guarantee, the end of the window) between _SLIVER_NOISE and _SLIVER apart,
    or whose life-contingent part is shorter than _SHORT.

    The general path integrates between the cut points and drops a piece no longer than
    1e-12 years, which is here integrated exactly; where such slivers recur every year the
    two differ by about their length relative, so these items are valued by the general
    path (a window would need to be placed within 1.5e-12 years of such a point).
    """
    frac, horizon = _ages(tables, cols)
    u, g = cols.deferral, cols.guarantee
    end = np.minimum(u + cols.term, np.maximum(u + g, horizon))
    c = frac + u
    has_g = (g > 0) & (g < end - u)
    near = np.zeros(len(cols), dtype=bool)
    with np.errstate(invalid="ignore"):
        for x, where in ((c, True), (g, has_g), (c + g, has_g), (end - u, True),
                         (frac + end, True)):
            d = np.abs(x - np.round(x))
            near |= where & (d > _SLIVER_NOISE) & (d <= _SLIVER)
    life = np.minimum(u + cols.term, horizon) - (u + g)
    return near | ((life > 0) & (life < _SHORT))


def _chains(tables, t, dkey, mult, extra, anchor, growth):
    """Consecutive items (sorted by key) with the same key share one chain: return each
    item's chain, the representative items, the chains' rates q (from the integer age,
    q = 1 from the table's last age) and survival cum (C_0 = 1 .. C_width)."""
    from service.engine.columns import _chain_rates, _sorted_chains

    chain, rep = _sorted_chains((t, dkey, mult, extra, anchor, growth))
    q, cum = _chain_rates(tables, t[rep], anchor[rep], dkey[rep], mult[rep], extra[rep])
    return chain, rep, q, cum


def _value_chunk(tables, cols, idx, ages, anchor, dkey, growth, delta, assumption):
    from service.engine.columns import _alive_at, _whole_years

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
        alive = _alive_at(q, cum, chain, frac + u, start, assumption)
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
    # Ages are carried with their rounding error (as hi + lo), so that a short part of a
    # year keeps its length to rounding of itself.
    s0, s0_lo = _two_sum(frac, np.where(live, t0, 0.0))
    s1, s1_lo = _two_sum(frac, np.where(live, t1, 0.5))
    ka = np.floor(s0).astype(np.int64)
    kb = np.minimum(np.ceil(s1).astype(np.int64) - 1, width - 1)
    kb = np.maximum(kb, ka)
    h0 = (s0 - ka, s0_lo)  # (exact differences: s0 lies in [ka, ka + 1])
    h1 = (s1 - kb, s1_lo)
    c, c_lo = _two_sum(frac, u)
    big_c = np.floor(c)
    gamma = (c - big_c, c_lo)
    kappa = np.exp(delta * frac - big_c * growth)
    rho = np.exp(-growth)
    lw = growth - delta  # ln w
    if assumption == "udd":
        cum2 = np.concatenate([cum, np.zeros((rep.size, 1))], axis=1)  # C up to width + 1
        zero = (np.zeros(idx.size), np.zeros(idx.size))
        full = (np.ones(idx.size), np.zeros(idx.size))
        # The first year, the last (where it is another) and the whole years between.
        (a1, b1), (a2, b2), (af, bf) = _weights(
            [(h0, _where(kb == ka, h1, full)), (zero, h1), (zero, full)], delta, gamma, rho,
            kappa)
        life = np.exp(ka * lw) * (a1 * cum2[chain, ka] + b1 * cum2[chain, ka + 1])
        two = live & (kb > ka)
        life += np.where(two, np.exp(kb * lw) * (a2 * cum2[chain, kb]
                                                 + b2 * cum2[chain, kb + 1]), 0.0)
        mid = live & (kb > ka + 1)
        if mid.any():
            life += _whole_years(cum2, chain, lw, growth, delta, rep, ka, kb, af, bf, mid)
    else:
        life = _per_year(q, cum, chain, lw, ka, kb, h0, h1, gamma, rho, kappa, delta,
                         assumption, live)
    values += np.where(live, life / start, 0.0)
    return values


def _two_sum(a, b):
    """a + b as hi + lo, hi the rounded sum and lo its rounding error (Knuth's TwoSum)."""
    hi = a + b
    b_ = hi - a
    a_ = hi - b_
    return hi, (a - a_) + (b - b_)


def _where(cond, x, y):
    return np.where(cond, x[0], y[0]), np.where(cond, x[1], y[1])


def _before(x, y):
    return (x[0] < y[0]) | ((x[0] == y[0]) & (x[1] <= y[1]))


def _parts(h0, h1, gamma):
    """The parts of [h0, h1] (h0 <= h1; positions as hi + lo) of a year of age before and
    after gamma: (start, 1 - end, length) of each, the length 0 where a part is empty."""
    split_in = _where(_before(h1, gamma), h1, gamma)  # the end of the part before gamma
    split_out = _where(_before(h0, gamma), gamma, h0)  # the start of the part after it
    out = []
    for a, b in ((h0, split_in), (split_out, h1)):
        length = np.maximum((b[0] - a[0]) + (b[1] - a[1]), 0.0)
        rest = np.clip((1.0 - b[0]) - b[1], 0.0, 1.0)
        out.append((np.clip(a[0] + a[1], 0.0, 1.0), rest, length))
    return out


def _weights(ranges, delta, gamma, rho, kappa):
    """A and B (see the module's derivation) of each range [h0, h1] of a year of age in
    ``ranges`` (positions as hi + lo, one per item), all in one pass.

    With L = b - a and phi_n at delta L: I(h; a, b) = e^(-delta a) L [a phi_0 + L phi_1] and
    I(1 - h; a, b) = e^(-delta a) L [((1 - b) + L) phi_0 - L phi_1], 1 - b and L each
    carried to rounding of itself (so that a part ending near the end of the year keeps its
    precision); phi_0 - phi_1 = int_0^1 (1 - v) e^(-delta L v) dv is at least 0.4 phi_0
    while delta L >= -1 (rates of interest above -63%), so the difference loses a bit or
    two at most."""
    n = len(ranges)
    h0 = tuple(np.concatenate([r[0][j] for r in ranges]) for j in (0, 1))
    h1 = tuple(np.concatenate([r[1][j] for r in ranges]) for j in (0, 1))
    parts = _parts(h0, h1, (np.tile(gamma[0], n), np.tile(gamma[1], n)))
    every = np.concatenate([delta * length for _, _, length in parts])
    p0, p1 = np.split(phi(0, every), 2), np.split(phi(1, every), 2)
    down, up = [], []
    for k, (a, rest, length) in enumerate(parts):
        lead = np.exp(-delta * a) * length
        down.append(lead * ((rest + length) * p0[k] - length * p1[k]))
        up.append(lead * (a * p0[k] + length * p1[k]))
    rho_, kappa_ = np.tile(rho, n), np.tile(kappa, n)
    big_a = kappa_ * (rho_ * down[0] + down[1])
    big_b = kappa_ * (rho_ * up[0] + up[1])
    return list(zip(np.split(big_a, n), np.split(big_b, n), strict=True))


#: (item, year) pairs integrated at once by the per-year pass, by assumption: Balducci's
#: closed form (an exponential integral near its pole, else a Gauss-Legendre rule) holds
#: many more temporaries a pair (bench/costly.py: 190 MiB at 200,000 pairs, past the
#: 137 MiB budget of a valuation).
_CHUNK_PAIRS = {"udd": 200_000, "constant-force": 200_000, "balducci": 40_000}


def _per_year(q, cum, chain, lw, ka, kb, h0, h1, gamma, rho, kappa, delta, assumption, live):
    """Life-contingent values of ``live`` items integrated year by year (any assumption):
    each year of age in its two parts, by the general path's closed forms."""
    single = by_assumption(_SINGLE, assumption)
    chunk = by_assumption(_CHUNK_PAIRS, assumption)
    size = chain.size
    out = np.zeros(size)
    items = np.flatnonzero(live)
    cost = kb[items] - ka[items] + 1
    total = np.cumsum(cost)
    begin = 0
    while begin < items.size:
        base = total[begin - 1] if begin else 0
        stop = max(int(np.searchsorted(total, base + chunk, side="right")), begin + 1)
        sel = items[begin:stop]
        begin = stop
        own, k = _expand(sel, ka[sel], kb[sel] + 1)
        zero = (np.zeros(own.size), np.zeros(own.size))
        full = (np.ones(own.size), np.zeros(own.size))
        lo = _where(k == ka[own], (h0[0][own], h0[1][own]), zero)
        hi = _where(k == kb[own], (h1[0][own], h1[1][own]), full)
        ch = chain[own]
        qk = q[ch, k]
        inside, outside = _parts(lo, hi, (gamma[0][own], gamma[1][own]))
        acc = np.zeros(own.size)
        for (a, _, length), weight in ((inside, rho[own]), (outside, 1.0)):
            with np.errstate(divide="ignore", invalid="ignore"):
                part = single(qk, a, delta, length)
            acc += np.where(length > 0, weight * np.exp(-delta * a) * part, 0.0)
        term = np.exp(k * lw[own]) * kappa[own] * cum[ch, k] * acc
        out += np.bincount(own, weights=term, minlength=size)
    return out

