"""A handful of single-life discrete items valued in plain floats.

On a batch of a few items the column path (:mod:`service.engine.columns`) spends its time in
the fixed cost of a hundred-odd numpy calls on arrays of one element. Here the same
derivation (see that module's docstring: a year of age K contributes
w^K (A C_K + B C_(K+1)) under UDD, A and B sums over the year's payment slots) is evaluated
item by item in Python floats, the slot sums taken from the same prefix tables.

A life past any select period takes its survival from the table-wide column of its key
(table, multiplier, flat extra, escalation against the rate), as
:mod:`service.engine.commutation` builds them, kept between calls (a basis' tables at its
own rate are a few keys): its whole years are a difference of the column's prefix or suffix
sums, so an item costs the same at any term. A life in its select period, or one whose
column died before its age, is valued on its own chain a year of age at a time. The results
are the column path's to rounding.

Covered: one life, in advance or in arrears, any frequency, under UDD and one flat rate,
items already checked (:func:`value_rows` takes what :func:`service.engine.columns.problems`
passed). Everything else goes to the column path.
"""

import math
import operator
from functools import lru_cache
from itertools import accumulate

import numpy as np

#: Batches up to this size are valued here (when every item is covered).
SMALL_BATCH = 8
_SNAP = 1e-9  # as service.engine.survival
_EPS = 1e-9  # as service.engine.annuity
_ILL = 1e-3  # as service.engine.columns
_CANCELLATION = 64.0  # as service.engine.columns


def _phi0(x: float) -> float:
    """integral_0^1 e^(-x u) du, as service.engine.integrals.phi(0, x)."""
    return 1.0 if x == 0 else -math.expm1(-x) / x


def _annuity_certain(delta: float, n: float, m: int, advance: bool) -> float:
    """a-due^(m)_n (or a^(m)_n in arrears) at force ``delta``, as interest.annuity_certain."""
    value = n * _phi0(n * delta) / _phi0(delta / m)
    return value if advance else value * math.exp(-delta / m)


@lru_cache(maxsize=64)
def _prefix(m: int, delta: float) -> tuple[list[float], list[float]]:
    """P0[k] = sum_(i<k) x^i and P1[k] = sum_(i<k) i x^i, x = e^(-delta/m), k = 0..m (the
    column path's slot tables, accumulated in the same order)."""
    p0, p1 = [0.0], [0.0]
    s0 = s1 = 0.0
    for i in range(m):
        x = math.exp(-delta * i / m)
        s0 += x
        s1 += i * x
        p0.append(s0)
        p1.append(s1)
    return p0, p1


def _chain(table, anchor: int, dkey: int, mult: float, extra: float, width: int) -> list[float]:
    """q_k, k < width, of a life at whole age ``anchor`` (as columns._year_rates)."""
    last = table.last_age
    lo = anchor - table.first_age
    ultimate = table.q[lo:min(last - table.first_age, lo + width)].tolist()
    base = ultimate + [1.0] * (width - len(ultimate))
    period = table.select_period
    if period and dkey >= 0:
        row = anchor - dkey - table.select_first_age
        for k in range(min(period - dkey, width)):
            if anchor + k < last:
                base[k] = float(table.select_q[row, dkey + k])
    out = base if mult == 1.0 and extra == 0.0 else [min(b * mult + extra, 1.0) for b in base]
    for k in range(max(last - anchor, 0), width):
        out[k] = 1.0  # q = 1 from the last age, whatever the multiplier
    return out


def suspect(tables, row) -> bool:
    """Whether the life of a checked row may be impossible under its table (outside its
    ages, selected outside the select table, or dead at its age: the column path's
    ``_life_suspects`` for one row, under UDD)."""
    t, age, duration, adjustment, mult, extra = row[:6]
    table = tables[t]
    x = age + adjustment
    if not (table.first_age - _SNAP <= x <= table.last_age + _SNAP):
        return True
    anchor = math.floor(x + _SNAP)
    dkey = _select_key(table, duration)
    if dkey >= 0 and not (table.select_first_age <= anchor - dkey <= table.select_last_age):
        return True
    q0 = (_rates(table, mult, extra)[anchor - table.first_age] if dkey < 0
          else _chain(table, anchor, dkey, mult, extra, 1)[0])
    return 1.0 - max(x - anchor, 0.0) * q0 <= 0


def _select_key(table, duration: float) -> int:
    if math.isfinite(duration) and duration < table.select_period:
        return int(duration)
    return -1


def value_rows(tables, rows, delta: float) -> list[float]:
    """Values of 1 p.a. of checked single-life discrete items under UDD at the constant
    force of interest ``delta``; each row holds columns.FIELDS in order (timing a code: 0
    in advance, 1 in arrears)."""
    return [_value_row(tables, row, delta) for row in rows]


def _value_row(tables, row, delta: float) -> float:
    (t, age, duration, adjustment, mult, extra, timing, m, term, u, g, escalation) = row
    table = tables[t]
    m = int(m)
    x = age + adjustment
    anchor = math.floor(x + _SNAP)
    frac = max(x - anchor, 0.0)
    last = table.last_age
    width = last - anchor + 3  # C_K = 0 from K = last - anchor + 1
    growth = math.log1p(escalation)

    # Payment windows (as columns._value_chunk).
    arr = 1 if timing == 1 else 0
    horizon = last + 1.0 - (anchor + frac)
    by_life = max(math.floor(max(horizon - u, -1.0) * m + _EPS) + 1, 0)
    guaranteed = round(g * m)
    count = max(by_life, guaranteed)
    if math.isfinite(term):
        count = min(count, round(term * m))
    first = min(guaranteed, count)
    n0 = round(u * m) + arr

    fm = frac * m
    big = math.floor(fm)
    phi = fm - big
    if phi >= 1.0 - m * _SNAP:
        big, phi = big + 1, phi - 1.0
    dq, dm = divmod(big + n0, m)
    kappa = math.exp(delta * big / m - dq * growth)
    rho = math.exp(-growth)
    lw = growth - delta
    ka, ia = divmod(n0 + first + big, m)
    kb, ib = divmod(n0 + count - 1 + big, m)
    kb = min(kb, width - 1)
    ku = 0
    if guaranteed > 0:
        s = frac + u
        ku = math.floor(s + _SNAP)
        ru = min(max(s - ku, 0.0), 1.0)
        ku = min(max(ku, 0), width)
    # Survival C_k (k <= need) and rates q_k (k < need), from the table-wide column of the
    # life's key where it can stand in for the life's own chain, else from that chain.
    need = min(width, max(kb + 2 if count > first else 1, ku + 1))
    dkey = _select_key(table, duration)
    column = _column(table, mult, extra, lw) if dkey < 0 else None
    base = anchor - table.first_age
    if column is not None and column.ok and column.life[base] > 0:
        lives, rates = column.life, column.q
        at = 1.0 / lives[base]
    else:
        column, base, at = None, 0, 1.0
        rates = _chain(table, anchor, dkey, mult, extra, need)
        lives = [1.0, *accumulate([1.0 - rate for rate in rates], operator.mul)]
    start = 1.0 - frac * rates[base]

    value = 0.0
    if guaranteed > 0:
        alive = (lives[base + ku] * at * (1.0 - ru * rates[base + min(ku, width - 1)])
                 / start)
        whole, part = divmod(guaranteed, m)
        lam = delta - growth
        advance = arr == 0
        years = (whole * _phi0(whole * lam) / _phi0(lam)
                 * _annuity_certain(delta, 1.0, m, advance))
        tail = (math.exp(-lam * whole) * _annuity_certain(delta, part / m, m, advance)
                if part > 0 else 0.0)
        value += alive * math.exp(-delta * u) * (years + tail)
    if count <= first:
        return value

    p0, p1 = _prefix(m, delta)

    def weights(lo: int, hi: int) -> tuple[float, float]:
        """(A, B): sums of c_i (1 - s_i) and c_i s_i over the slots lo <= i < hi."""
        lo = min(lo, hi)
        lo_in, hi_in = min(lo, dm), min(hi, dm)
        lo_out, hi_out = max(lo, dm), max(hi, dm)
        s0 = rho * (p0[hi_in] - p0[lo_in]) + (p0[hi_out] - p0[lo_out])
        s1 = rho * (p1[hi_in] - p1[lo_in]) + (p1[hi_out] - p1[lo_out])
        b = kappa * (phi * s0 + s1) / m
        a = kappa * ((m - phi) * s0 - s1) / m
        if lo == 0 and hi > 0 and phi < 0:  # the first slot's fraction clipped to 0
            shift = kappa * (rho if dm > 0 else 1.0) * (-phi / m)
            a, b = a - shift, b + shift
        if a < _ILL * (a + b):  # a few slots at the very end of the year: slot by slot
            a = sum(kappa * (rho if i < dm else 1.0) * math.exp(-delta * i / m)
                    * (1.0 if phi + i < 0 else ((m - i) - phi) / m) for i in range(lo, hi))
        return a, b

    a1, b1 = weights(ia, ib + 1 if kb == ka else m)
    life = math.exp(ka * lw) * (a1 * lives[base + ka] + b1 * lives[base + ka + 1])
    if kb > ka:
        a2, b2 = weights(0, ib + 1)
        life += math.exp(kb * lw) * (a2 * lives[base + kb] + b2 * lives[base + kb + 1])
    if kb > ka + 1:
        af, bf = weights(0, m)
        life += _whole_years(column, lives, base, ka + 1, kb, lw, af, bf)
    return value + life * at / (m * start)


def _whole_years(column, lives, base: int, lo: int, hi: int, lw: float, af: float,
                 bf: float) -> float:
    """sum over lo <= K < hi of w^K (A S(K) + B S(K + 1)), S(k) = lives[base + k] (w = e^lw):
    from the column's sums where it has them and the difference does not cancel badly
    (as commutation._whole_years), else term by term."""
    if column is not None:
        i0, i1 = base + lo, base + hi
        pre = af * column.pd[i0] + bf * column.pe[i0]
        suf = af * column.sd[i1] + bf * column.se[i1]
        if pre <= suf:
            total = af * (column.pd[i1] - column.pd[i0]) + bf * (column.pe[i1] - column.pe[i0])
        else:
            total = af * (column.sd[i0] - column.sd[i1]) + bf * (column.se[i0] - column.se[i1])
        if min(pre, suf) <= _CANCELLATION * total:
            return total * math.exp(-base * lw)
    # w^K by repeated multiplication (relative error about K eps, K < 200)
    w, wk, whole = math.exp(lw), math.exp(lo * lw), 0.0
    for c0, c1 in zip(lives[base + lo:base + hi], lives[base + lo + 1:base + hi + 1],
                      strict=True):
        whole += wk * (af * c0 + bf * c1)
        wk *= w
    return whole


class _Column:
    """One key's column over its table's ages j = age - first age (``_column``): q'(j),
    L(j) (L(0) = 1), and the prefix and suffix sums of D(j) = w^j L(j) and E(j) = w^j L(j + 1)
    (``pd[i]``: the sum over j < i; ``sd[i]``: over j >= i), as lists of floats; ``ok``
    where every L and D lies within the bounds commutation keeps."""

    __slots__ = ("q", "life", "pd", "sd", "pe", "se", "ok")

    def __init__(self, q, life, pd, sd, pe, se, ok):
        self.q, self.life, self.pd, self.sd, self.pe, self.se, self.ok = (
            q, life, pd, sd, pe, se, ok)


#: Columns kept (by table, multiplier, flat extra and escalation against the rate): a
#: basis' tables at its own rate are a handful of keys.
_COLUMNS_KEPT = 256


@lru_cache(maxsize=_COLUMNS_KEPT)
def _rates(table, mult: float, extra: float) -> list[float]:
    """q'(j) = min(q x mult + extra, 1) at the ages j = age - first age of ``table``, with
    q' = 1 from the last age (as on a chain) and for three ages past it: the rates of
    :func:`_column`, whatever the rate of interest. (Tables compare by identity.)"""
    return _column(table, mult, extra, 0.0).q


@lru_cache(maxsize=_COLUMNS_KEPT)
def _column(table, mult: float, extra: float, lw: float) -> _Column:
    """The column of lives of ``table`` with rates q' = min(q x mult + extra, 1) at w = e^lw:
    the key's row of :class:`service.engine.commutation._Shared`, as lists."""
    from service.engine.commutation import _Shared  # (it builds on columns, which uses this)

    one = _Shared.build([table], np.zeros(1, dtype=np.int64), np.array([float(mult)]),
                        np.array([float(extra)]), np.array([float(lw)]))
    return _Column(one.q[0].tolist(), one.life[0].tolist(), one.pd[0].tolist(),
                   one.sd[0].tolist(), one.pe[0].tolist(), one.se[0].tolist(), bool(one.ok[0]))
