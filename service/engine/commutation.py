"""Single-life discrete items under UDD valued from table-wide columns: the commutation idea
generalised to fractional ages, m-thly payments, select periods and escalation.

:mod:`service.engine.columns` builds a chain of survival per (table, select duration,
multiplier, flat extra, integer age, escalation), which costs a row of the table's length per
distinct chain: when few items share a chain (a mixed batch), that row is most of the work.
Here every life with the same (table, multiplier, flat extra) shares one column over the
table's ages,

    L(y) = prod_(first age <= z < y) (1 - q'(z)),   q'(z) = min(q(z) x multiplier + extra, 1)

(q' = 1 from the last age), and every item with the same escalation too the columns
D(y) = w^j L(y) and E(y) = w^j L(y + 1) (j = y - first age, w = v (1 + r)) with their prefix
and suffix sums. A life at integer age a, in its select period for its first s years, has

    C_k = Csel_k                      for k <= s (its select rates, at most a select period)
    C_k = Csel_s L(a + k) / L(a + s)  for k >= s,

so its whole years ka < K < kb (see columns' derivation: A_full M0 + B_full M1 with
M0 = sum w^K C_K, M1 = sum w^K C_(K+1)) are a select part summed directly (at most the select
period) and an ultimate part that is Csel_s / (L(a + s) w^(a - first)) times a difference of
the D and E sums (prefix or suffix, whichever subtracts less; directly where even that would
cancel badly, as columns does). The first and last years, the guarantee and the start are
the same as on a chain, with C_k looked up this way.

An item is left to the chains (:func:`value` says which) where its column cannot stand in for
its chain to rounding: L(a + s) is 0 (the column died before the life's age, as a flat extra
of 1 makes it) or the key's columns underflow or overflow (L or D outside 1e-290..1e290).
"""

import numpy as np

from service.engine import columns as _c
from service.engine.survival import between

#: L and D values are kept within these bounds (else the key's items go to the chains).
_TINY, _HUGE = 1e-290, 1e290


def value(tables, cols, ages, anchor, dkey, growth, m, delta, slots, deadline):
    """Return (values, done): the values of the items this module can value (``done``), of
    validated covered items under UDD at the constant force ``delta``; others are 0."""
    n = len(cols)
    values = np.zeros(n)
    done = np.zeros(n, dtype=bool)
    t = cols.table
    mult, extra = cols.mortality_multiplier, cols.flat_extra
    # Keys: (table, multiplier, flat extra, escalation), found per chunk of consecutive
    # items (views, not copies), whose columns are built for its own keys only (memory
    # bounded by the chunk).
    for start in range(0, n, _c._CHUNK_ITEMS):
        _c._on_time(deadline)
        part = slice(start, min(start + _c._CHUNK_ITEMS, n))
        keys = (t[part], mult[part], extra[part], growth[part])
        # Grouped by the keys' bits (sorting integers is quicker than sorting floats; equal
        # bits are equal values, and the one pair of equal values with other bits, 0.0 and
        # -0.0, only makes two keys with the same columns).
        bits = tuple(_bits(column) for column in keys)
        order = np.lexsort(bits[::-1])
        new = np.zeros(order.size, dtype=bool)
        new[0] = True
        for column in bits:
            ordered = column[order]
            new[1:] |= ordered[1:] != ordered[:-1]
        key = np.empty(order.size, dtype=np.intp)
        key[order] = np.cumsum(new) - 1
        rep = order[new]
        shared = _shared(tables, keys[0][rep], keys[1][rep], keys[2][rep],
                         keys[3][rep] - delta)
        values[part], done[part] = _value_chunk(
            tables, cols, part, shared, key, ages[part], anchor[part], dkey[part],
            growth[part], m[part], delta, slots)
    return values, done


def _bits(column: np.ndarray) -> np.ndarray:
    """A float column's values as the integers of their bits (others as they are)."""
    if column.dtype == np.float64:
        return np.ascontiguousarray(column).view(np.int64)
    return column


#: Key columns kept (``_shared``), and how many sets of keys.
_SHARED: dict[tuple, "_Shared"] = {}
_SHARED_KEPT = 16


def _shared(tables, t, mult, extra, lw) -> "_Shared":
    """``_Shared.build(tables, t, mult, extra, lw)``, kept by the tables (compared by identity)
    and the keys: a batch's chunks mostly share one set of keys, and so do successive
    batches under one basis at one rate. The columns depend on nothing else (tables are
    immutable) and are read-only."""
    found_key = (tuple(tables), t.dtype.str, t.tobytes(), mult.tobytes(), extra.tobytes(),
                 lw.tobytes())
    found = _SHARED.get(found_key)
    if found is None:
        found = _Shared.build(tables, t, mult, extra, lw)
        if len(_SHARED) >= _SHARED_KEPT:
            _SHARED.clear()
        _SHARED[found_key] = found
    return found


class _Shared:
    """The columns of each key: q', L, and the prefix and suffix sums of D and E."""

    def __init__(self, first, last, q, life, lw, pd, sd, pe, se, ok):
        self.first, self.last, self.q, self.life, self.lw = first, last, q, life, lw
        self.pd, self.sd, self.pe, self.se, self.ok = pd, sd, pe, se, ok
        self.width = life.shape[1] - 1
        # Element (key, i) of a column of n entries a key is element key * n + i of its flat
        # view: one gather from that is much quicker than a two-index gather. (q has width
        # entries a key, life width + 1 and the sums width + 2.)
        self.flat = {name: getattr(self, name).reshape(-1)
                     for name in ("q", "life", "pd", "sd", "pe", "se")}
        self.sums_width = pd.shape[1]

    @classmethod
    def build(cls, tables, t, mult, extra, lw):
        first = np.array([tb.first_age for tb in tables], dtype=np.int64)[t]
        last = np.array([tb.last_age for tb in tables], dtype=np.int64)[t]
        width = int((last - first).max()) + 4
        j = np.arange(width)
        q = _c._year_rates(tables, t[:, None], first[:, None], np.full((t.size, 1), -1),
                           mult[:, None], extra[:, None], j[None, :])
        life = np.ones((t.size, width + 1))
        life[:, 1:] = np.cumprod(1.0 - q, axis=1)
        with np.errstate(over="ignore", under="ignore", invalid="ignore"):
            w = np.exp(np.arange(width + 1)[None, :] * lw[:, None])
            d = w * life
            e = w[:, :-1] * life[:, 1:]
        e = np.concatenate([e, np.zeros((t.size, 1))], axis=1)
        ok = (np.all(np.isfinite(d) & (d < _HUGE) & ((d == 0) | (d > _TINY)), axis=1)
              & np.all((life == 0) | (life > _TINY), axis=1) & np.isfinite(lw))

        def sums(x):
            zero = np.zeros((x.shape[0], 1))
            prefix = np.concatenate([zero, np.cumsum(x, axis=1)], axis=1)
            suffix = np.concatenate([np.cumsum(x[:, ::-1], axis=1)[:, ::-1], zero], axis=1)
            return prefix, suffix

        pd, sd = sums(d)
        pe, se = sums(e)
        for array in (first, last, q, life, lw, pd, sd, pe, se, ok):
            array.setflags(write=False)  # (kept and shared: see _shared)
        return cls(first, last, q, life, lw, pd, sd, pe, se, ok)


def _value_chunk(tables, cols, idx, sh: _Shared, key, ages, anchor, dkey, growth, m, delta,
                 slots):
    """Values of the items ``idx`` (an index or a slice of ``cols``), and which of them the
    key columns could value."""
    size = key.size
    t = cols.table[idx]
    last = sh.last[key]
    base = anchor - sh.first[key]  # the column index of the integer age
    # Select years: s of them, rates sq (q = 1 from the last age, as on a chain).
    period = np.array([tb.select_period for tb in tables], dtype=np.int64)[t]
    s = np.where(dkey >= 0, np.maximum(period - dkey, 0), 0)
    top = int(s.max(initial=0))
    if top:
        k = np.arange(top)[None, :]
        sq = _c._year_rates(tables, t[:, None], anchor[:, None], dkey[:, None],
                            cols.mortality_multiplier[idx][:, None],
                            cols.flat_extra[idx][:, None], k)
        sq = np.where(k < s[:, None], sq, 0.0)
        csel = np.ones((size, top + 1))
        csel[:, 1:] = np.cumprod(1.0 - sq, axis=1)
    else:
        sq = np.zeros((size, 0))
        csel = np.ones((size, 1))
    rows = np.arange(size)
    wide = key * (sh.width + 1)  # where each item's key row starts in the flat lives
    narrow = key * sh.width  # the same in the flat rates
    life_flat, q_flat = sh.flat["life"], sh.flat["q"]
    at_s = life_flat[wide + np.minimum(base + s, sh.width)]
    ok = sh.ok[key] & (at_s > 0)
    scale = np.where(ok, csel[rows, s] / np.where(ok, at_s, 1.0), 0.0)

    csel_flat, csel_rows = csel.reshape(-1), rows * (top + 1)
    sq_flat, sq_rows = sq.reshape(-1), rows * top

    def chain(kk):
        """C_k of each item at its k (arrays)."""
        ult = life_flat[wide + np.minimum(base + np.maximum(kk, s), sh.width)]
        return np.where(kk < s, csel_flat[csel_rows + np.minimum(kk, top)], scale * ult)

    def rate(kk):
        """q_k of each item at its k."""
        ultimate = q_flat[narrow + np.minimum(base + kk, sh.width - 1)]
        if top:
            inside = kk < s
            sel = sq_flat[sq_rows + between(kk, 0, top - 1)]
            return np.where(inside, sel, ultimate)
        return ultimate

    width = last - anchor + 3  # C_k = 0 from k = last - anchor + 1
    start = 1.0 - np.maximum(ages - anchor, 0.0) * rate(np.zeros(size, dtype=np.int64))
    win = _c._windows(cols, idx, ages, anchor, growth, m, delta, last)
    values = np.zeros(size)
    if (win.guaranteed > 0).any():
        pos = win.frac + win.u
        ku = np.floor(pos + _c._SNAP)
        ru = between(pos - ku, 0.0, 1.0)
        ku = between(ku, 0, width).astype(np.int64)
        alive = chain(ku) * (1.0 - ru * rate(np.minimum(ku, width - 1))) / start
        values += _c._guarantee(win, m, growth, delta, alive)
    live = win.live
    if not live.any():
        return values, ok
    ka, ia, ib = win.ka, win.ia, win.ib
    kb = np.where(live, np.minimum(win.kb, width - 1), 0)
    lw = win.lw
    ctx = _c._Slots.of(m, win.mf, win.dm, win.rho, win.kappa, win.phi, slots, delta)
    one = np.zeros(size, dtype=np.int64)
    a1, b1 = ctx.weights(ia, np.where(kb == ka, ib + 1, m))
    life = np.exp(ka * lw) * (a1 * chain(ka) + b1 * chain(ka + 1))
    two = live & (kb > ka)
    a2, b2 = ctx.weights(one, ib + 1)
    life += np.where(two, np.exp(kb * lw) * (a2 * chain(kb) + b2 * chain(kb + 1)), 0.0)
    mid = live & (kb > ka + 1) & ok
    if mid.any():
        af, bf = ctx.weights(one, m)
        life += _whole_years(sh, key, base, s, top, lw, ka, kb, af, bf, mid, chain, scale)
    values += np.where(live, life / (win.mf * start), 0.0)
    return values, ok


def _whole_years(sh: _Shared, key, base, s, top, lw, ka, kb, af, bf, mid, chain, scale):
    """A_full M0 + B_full M1 over the whole years ka < K < kb of each item ``mid``."""
    size = key.size
    out = np.zeros(size)
    lo = np.where(mid, ka + 1, 0)
    hi = np.where(mid, kb, 0)
    # Select years (fewer than a select period) directly.
    for k in range(top):
        inside = mid & (k >= lo) & (k < np.minimum(hi, s))
        if inside.any():
            kk = np.full(size, k)
            out += np.where(inside, np.exp(k * lw) * (af * chain(kk) + bf * chain(kk + 1)),
                            0.0)
    # Ultimate years from the key's sums: sum over y = a + K of w^(j - b) L(y) (j = y -
    # first age, b = a - first age) times Csel_s / L(a + s).
    lo = np.maximum(lo, s)
    ult = mid & (hi > lo)
    if not ult.any():
        return out
    row = key * sh.sums_width  # where each item's key row starts in the flat sums
    i0 = row + np.where(ult, base + lo, 0)
    i1 = row + np.where(ult, base + hi, 0)
    flat = sh.flat
    pd, sd, pe, se = flat["pd"], flat["sd"], flat["pe"], flat["se"]
    pre0, pre1 = pd[i0], pe[i0]
    suf0, suf1 = sd[i1], se[i1]
    by_prefix = (pre0 * af + pre1 * bf) <= (suf0 * af + suf1 * bf)
    m0 = np.where(by_prefix, pd[i1] - pre0, sd[i0] - suf0)
    m1 = np.where(by_prefix, pe[i1] - pre1, se[i0] - suf1)
    value = af * m0 + bf * m1
    taken = np.where(by_prefix, pre0 * af + pre1 * bf, suf0 * af + suf1 * bf)
    factor = scale * np.exp(-base * lw)  # Csel_s / (L(a + s) w^b): the key's sums to the chain's
    bad = ult & (taken > _c._CANCELLATION * value)
    if bad.any():
        which = np.flatnonzero(bad)
        direct = np.zeros(which.size)
        for part in _c._pair_chunks(hi[which] - lo[which]):
            sel = which[part]
            own, k = _c._expand(np.arange(sel.size), lo[sel], hi[sel])
            item = sel[own]
            j = base[item] + k
            term = np.exp(j * lw[item]) * (af[item] * sh.life[key[item], j]
                                           + bf[item] * sh.life[key[item], j + 1])
            direct[part] = np.bincount(own, weights=term, minlength=sel.size)
        value[which] = direct
    return out + np.where(ult, factor * value, 0.0)
