"""Two-life discrete annuities under one flat rate, on shared chains of survival.

:func:`service.engine.columns.dispatch` sends here the two-life items with discrete payments
(joint life, last survivor, reversionary: any survivorship amounts, any start requirement,
guarantee, deferral, term, escalation, m-thly in advance or in arrears) under a flat rate,
exact sums or annual payments; the results are those of the general path to rounding, with
its method code (exact sums).

Derivation (flat force of interest delta; escalation growth g = ln(1 + r))
---------------------------------------------------------------------------
Each life follows a chain of rates from its integer age a (select rates first, multiplier
and flat extra applied, q = 1 from the table's last age), shared, as in
:mod:`service.engine.columns`, by the lives with the same (table, select duration,
multiplier, flat extra, integer age): C_k = prod_(j<k) (1 - q_j), and the life aged a + f
survives t years with probability p(t) = C_K r_p(a+K) / f_p(a) where f + t = K + r.

With p1, p2 the two lives' survival to a payment date t at or after the deferral u, the
states (both alive, only the first, only the second; the start requirement met) have the
probabilities p1 p2, R1 p1 - p1 p2 and R2 p2 - p1 p2 (R1 the probability that the second
life meets what the requirement asks of it at u, R2 the same of the first; 1 where nothing
is asked), so with the survivorship amounts (ab, a1, a2) the expected fraction payable is

    W(t) = a1 R1 p1 + a2 R2 p2 + (ab - a1 - a2) p1 p2.

The life-contingent payments (j from the first unguaranteed period to the last one either
life can reach) are worth sum_j (1 + r)^floor(j/m) / m v^t W(t), t = u + (j + arr)/m.

Annual payments under UDD: life i's survival at payment j (n = U + arr + j) is
((1 - s_i) C_i[j + o_i] + s_i C_i[j + o_i + 1]) / f_p, o_i = n - j + G_i, s_i its fraction
of age (G_i = 1, s_i = 0 for an age within 1e-9 below a whole one, as the general path
snaps it). With w = v (1 + r) the payments j0 <= j < j1 are then worth v^(U + arr) times
sums of w^j C_i[j + o_i + e] (e = 0, 1) for each life, and for the joint term of
w^j C_1[j + o_1 + e1] C_2[j + o_2 + e2]: with k = j + o_1 and D = o_2 - o_1 these are
w^-(o_1) times windows [j0 + o_1, j1 + o_1) of the columns w^k C_1[k] C_2[k + D],
w^k C_1[k] C_2[k + D + 1] and w^k C_1[k + 1] C_2[k + D] (the fourth product, both lives a
year on, is the first column one year on). Each column is built once per distinct chain
(singles) or pair of chains and D (joint) and escalation, in groups that bound memory, and
a window is a difference of its suffix sums (nothing subtracted for a window that runs to
the end of the chains). An item whose difference subtracts more than 64 times its result,
or whose terms (each life alone, the joint one) cancel more than that, has its payments
summed as below instead (so a value the general path finds to be 0 stays 0).

Other items (m > 1, a constant force, Balducci's assumption) and those: one pass over the
(item, payment) pairs, vectorised across items and chunked to bound memory, with the
general path's steps (each life's survival from its chain, the same floating-point steps:
in a year with q = 1 rounding decides whether a life is alive at its very start; then the
three states); no second life is invented for a single life, and nothing is built that
the sum does not need.

The guarantee (g m payments certain once the requirement is met at u) is ab P(start) v^u
times sum_k ((1 + r) v)^k a(1) over its whole years plus its part year, in closed form, and
is computed only for items that have one.

Two-life items given as columns (:class:`JointColumns`: the first life and the payments as
:class:`~service.engine.columns.Columns`, the second life's fields suffixed 2, a NaN
``age2`` marking a single life, the survivorship amounts ``both``, ``first_only``,
``second_only`` and ``start_requires``; see :func:`value_joint_columns`, which
``columns.value_columns`` calls) reach the same arrays (:class:`_Pairs`) without Item
objects: the scan of Item objects and the columns feed one valuation. Their problems are
the general path's: array checks find the rows that may fail, which are built as Items and
prepared by the general path (:func:`problems`).
"""

import math
from collections.abc import Mapping
from dataclasses import dataclass, replace
from functools import partial

import numpy as np

from service.engine import annuity
from service.engine.annuity import Values
from service.engine.batch import _expand, _on_time, _prepare
from service.engine.columns import (
    FIELDS,
    Columns,
    _chain_rates,
    _field_suspects,
    _found,
    _from_rows,
    _item_row,
    _life_suspects,
    _pair_chunks,
    _row_item,
    _select_key,
    _value_rest,
    _whole_or_float,
    _within,
    value_columns,
)
from service.engine.columns import _work as _column_work
from service.engine.errors import ItemError, WorkLimitError
from service.engine.integrals import phi
from service.engine.interest import annuity_certain
from service.engine.items import EXACT_SUM, START_REQUIREMENTS, Item, Life, Valuation, methods
from service.engine.survival import fraction_survival

_SNAP = 1e-9  # as service.engine.survival
_EPS = 1e-9  # as service.engine.items
#: Items valued at once (their chains are built per chunk).
_CHUNK_ITEMS = 16_384
#: Cells of cumulative columns built at once.
_CHUNK_CELLS = 400_000
#: A difference of cumulative columns that subtracts more than this many times its value is
#: summed payment by payment instead.
_CANCELLATION = 64.0

_LIFE = ("table", "age", "duration", "age_adjustment", "mortality_multiplier", "flat_extra")
_PAY = ("timing", "frequency", "term", "deferral", "guarantee", "escalation")
_ROW = 22  # numbers per item: two lives, the payments, the amounts, the start requirement


_REQUIREMENT_CODE = {name: k for k, name in enumerate(START_REQUIREMENTS)}
#: The timings valued here (continuous payments are the general path's).
_DISCRETE = ("advance", "arrears")


def _scan(items, exact: bool, _type=type, _int=int, _len=len, _code=_REQUIREMENT_CODE):
    """(places, numbers) of the two-life items that may be covered here (_ROW numbers an
    item, one flat list): discrete payments,
    whole-number frequencies (annual unless ``exact``), whole tables and durations, a known
    start requirement and three survivorship amounts (their range is checked on the
    arrays). Anything else (errors included) is the general path's. (The builtins are
    bound as defaults: this loop is most of the Python work of a batch.)"""
    places, flat = [], []
    add_place, add_row = places.append, flat.extend
    nan, inf = math.nan, math.inf
    n = -1
    for item in items:
        n += 1
        lives = item.lives
        if _len(lives) != 2:
            continue
        a, b = lives
        p = item.payments
        s = item.survivorship
        m = p.frequency
        ad, bd = a.duration, b.duration
        timing = p.timing
        req = item.start_requires
        if (_type(m) is _int and timing in _DISCRETE and (exact or m == 1)
                and _type(a.table) is _int and _type(b.table) is _int
                and (ad is None or _type(ad) is _int) and (bd is None or _type(bd) is _int)
                and req in START_REQUIREMENTS and _len(s) == 3):
            add_place(n)
            term = p.term
            add_row((a.table, a.age, nan if ad is None else ad, a.age_adjustment,
                     a.mortality_multiplier, a.flat_extra,
                     b.table, b.age, nan if bd is None else bd, b.age_adjustment,
                     b.mortality_multiplier, b.flat_extra,
                     timing == "arrears", m, inf if term is None else term, p.deferral,
                     p.guarantee, p.escalation, *s, _code[req]))
    return places, flat


class _Pairs:
    """The covered two-life items as arrays: ``lives[0]`` and ``lives[1]`` are
    :class:`~service.engine.columns.Columns` of each life with the item's payments;
    ``amounts`` (n, 3); ``requires`` indexes START_REQUIREMENTS. Built from the scan of Item
    objects (:meth:`from_table`) or straight from :class:`JointColumns`."""

    def __init__(self, first: Columns, second: Columns, amounts, requires):
        self.lives = [first, second]
        self.amounts = amounts
        self.requires = requires

    @classmethod
    def from_table(cls, table) -> "_Pairs":
        """From the scan's numbers (an item a row of ``table``, _ROW numbers)."""
        cols = np.ascontiguousarray(table.T)  # one row a field
        pay = {name: cols[12 + k] for k, name in enumerate(_PAY)}
        pay["timing"] = pay["timing"].astype(np.int8)
        lives = []
        for at in (0, 6):
            life = {name: cols[at + k] for k, name in enumerate(_LIFE)}
            life["table"] = life["table"].astype(np.intp)
            lives.append(Columns(**life, **pay))
        return cls(*lives, cols[18:21].T, cols[21].astype(np.int8))

    def __len__(self):
        return self.requires.size


def _suspect(tables, pairs: _Pairs, assumption: str) -> bool:
    """Whether some item may fail the general path's checks (a superset: then the general
    path's preparation decides, raising its own ItemError)."""
    one, two = pairs.lives
    if _field_suspects(one).any():  # the payments and the first life
        return True
    with np.errstate(invalid="ignore"):
        d = two.duration
        bad = (~np.isfinite(two.age + two.age_adjustment)
               | ~(np.isfinite(two.mortality_multiplier) & (two.mortality_multiplier >= 0))
               | ~((two.flat_extra >= 0) & (two.flat_extra <= 1))
               | (~np.isnan(d) & ~((d == np.round(d)) & (d >= 0) & np.isfinite(d))))
    if bad.any():
        return True
    first_age = np.array([tb.first_age for tb in tables])
    last_age = np.array([tb.last_age for tb in tables])
    for cols in pairs.lives:
        t = cols.table
        if not np.all((t >= 0) & (t < len(tables))):
            return True
        # Outside the table's ages, or selected outside the select table (as
        # columns._life_suspects; a life dead at its age is found while valuing).
        ages = cols.age + cols.age_adjustment
        if not np.all((ages >= first_age[t] - _SNAP) & (ages <= last_age[t] + _SNAP)):
            return True
        dkey = _select_key(tables, t, cols.duration)
        for ti, table in enumerate(tables):
            rows = (t == ti) & (dkey >= 0)
            if rows.any():
                sel = np.floor(ages[rows] + _SNAP).astype(np.int64) - dkey[rows]
                if np.any((sel < table.select_first_age) | (sel > table.select_last_age)):
                    return True
    return False


class _Refused(Exception):
    """A life found dead at its age while valuing (the general path refuses the item)."""


def _payment_window(tables, pairs: _Pairs):
    """(count, guaranteed): payment dates worth evaluating and guaranteed payments, as
    batch._payment_count."""
    cols = pairs.lives[0]
    m = cols.frequency
    horizon = None
    for life in pairs.lives:
        ages = life.age + life.age_adjustment
        anchor = np.floor(ages + _SNAP)
        x = anchor + np.maximum(ages - anchor, 0.0)
        last = np.array([tb.last_age for tb in tables], dtype=float)[life.table]
        h = last + 1.0 - x
        horizon = h if horizon is None else np.maximum(horizon, h)
    by_life = np.maximum(np.floor(np.maximum(horizon - cols.deferral, -1.0) * m + _EPS) + 1, 0)
    guaranteed = np.rint(cols.guarantee * m).astype(np.int64)
    count = np.minimum(np.maximum(by_life, guaranteed), np.rint(cols.term * m)).astype(np.int64)
    return count, guaranteed


def _work(count, guaranteed, m):
    """Work units as the general path counts them (batch._work at a flat rate)."""
    closed = np.minimum(guaranteed, count)
    return count - closed + -(-closed // m)


def _fast_work(tables, pairs: _Pairs):
    """(count, guaranteed, work units of them all) of validated ``pairs``."""
    count, guaranteed = _payment_window(tables, pairs)
    m = pairs.lives[0].frequency.astype(np.int64)
    return count, guaranteed, int(_work(count, guaranteed, m).sum())


def dispatch(tables, items, valuation, *, max_work, deadline) -> Values | None:
    """Value the covered two-life items of ``items`` here and the others by the general path;
    None where none is covered (or the rate is not flat).

    Errors are the general path's: on any suspected problem the whole list is prepared by
    it, which raises the same ItemError.
    """
    if valuation.curve.kind != "flat" or len(items) == 0:
        return None
    places, flat = _scan(items, valuation.approximation == "exact")
    if not places:
        return None
    table = np.fromiter(flat, float, len(flat)).reshape(len(places), _ROW)
    del flat  # (the Python list is not kept while valuing)
    amounts = table[:, 18:21]
    amiss = ~np.all((amounts >= 0) & (amounts <= 1), axis=1)
    if amiss.any():  # amounts out of range (or NaN): the general path's errors
        keep = np.flatnonzero(~amiss)
        places = [places[k] for k in keep.tolist()]
        if not places:
            return None
        table = table[keep]
    pairs = _Pairs.from_table(table)
    assumption = valuation.fractional_age
    if _suspect(tables, pairs, assumption):
        _prepare(tables, items, valuation)  # raises the general path's ItemError, if any
    count, guaranteed, fast_work = _fast_work(tables, pairs)
    size = len(items)
    values = np.zeros(size)
    code = np.full(size, EXACT_SUM, dtype=np.int8)
    if len(places) == size:  # every item (places ascend)
        which, rest = slice(None), np.zeros(0, dtype=np.intp)
    else:
        which = np.array(places, dtype=np.intp)
        others = np.ones(size, dtype=bool)
        others[which] = False
        rest = np.flatnonzero(others)
    _value_rest(partial(annuity.value_annuities, fast=False), tables, items, rest, valuation,
                values, code, fast_work=fast_work, max_work=max_work, deadline=deadline)
    try:
        values[which] = _value(tables, pairs, count, guaranteed, valuation, deadline)
    except _Refused:
        _prepare(tables, items, valuation)  # raises the general path's ItemError
        return None  # (not reached unless the checks disagree: then the general path)
    return Values(values, code, methods(valuation))


def value_general(tables, items, valuation, *, max_work, deadline) -> Values:
    """Value ``items`` as ``value_annuities(..., fast=False)`` would, the covered two-life
    items here (for columns.dispatch, whose single-life items are already valued)."""
    done = dispatch(tables, items, valuation, max_work=max_work, deadline=deadline)
    if done is not None:
        return done
    return annuity.value_annuities(tables, items, valuation, max_work=max_work,
                                   deadline=deadline, fast=False)


# ---------------------------------------------------------------------------------------------
# Valuation


class _Chains:
    """The chains of rates of a set of lives (shared by lives with the same key), flat:
    q of chain c, year k at ``q[c * width + k]``; C_k at ``cum[c * (width + 1) + k]``."""

    def __init__(self, tables, t, dkey, mult, extra, anchor):
        code = np.zeros(t.size, dtype=np.int64)
        for key in (t, dkey + 1, _ids(mult)[0], _ids(extra)[0], anchor - anchor.min()):
            code = code * (int(key.max()) + 1) + key
        _, chain = _codes(code)
        rep = np.empty(int(chain.max()) + 1, dtype=np.intp)
        rep[chain] = np.arange(t.size)
        q, cum = _chain_rates(tables, t[rep], anchor[rep], dkey[rep], mult[rep], extra[rep])
        width = q.shape[1]
        self.chain, self.width = chain, width
        self.q, self.cum = q.ravel(), cum.ravel()
        self.q0 = q[chain, 0]
        self._cum2d = cum

    def columns(self):
        """C_0 .. C_(width + 1) of each chain (the last 0), as rows."""
        return np.concatenate([self._cum2d, np.zeros((self._cum2d.shape[0], 1))], axis=1)

    def survival(self, life, frac, t, assumption):
        """S(f + t) / C_0 of lives ``life`` (the general path's steps; not over S(f))."""
        s = frac + t
        k = np.floor(s + _SNAP)
        r = np.clip(s - k, 0.0, 1.0)
        k = np.clip(k, 0, self.width).astype(np.intp)
        c = self.chain[life]
        qk = self.q[c * self.width + np.minimum(k, self.width - 1)]
        return self.cum[c * (self.width + 1) + k] * fraction_survival(qk, r, assumption)


def _value(tables, pairs: _Pairs, count, guaranteed, valuation, deadline) -> np.ndarray:
    n = len(pairs)
    values = np.zeros(n)
    delta = valuation.curve.constant_force
    for start in range(0, n, _CHUNK_ITEMS):
        _on_time(deadline)
        idx = slice(start, min(n, start + _CHUNK_ITEMS))  # (views, not copies)
        values[idx] = _value_chunk(tables, pairs, idx, count[idx], guaranteed[idx], delta,
                                   valuation.fractional_age, deadline)
    return values


def _value_chunk(tables, pairs: _Pairs, idx, count, guaranteed, delta, assumption, deadline):
    size = count.size
    one, two = (life.take(idx) for life in pairs.lives)
    ages = [c.age + c.age_adjustment for c in (one, two)]
    anchor = [np.floor(a + _SNAP).astype(np.int64) for a in ages]
    frac = [np.maximum(a - k, 0.0) for a, k in zip(ages, anchor, strict=True)]
    cat = np.concatenate
    t = cat([one.table, two.table])
    chains = _Chains(tables, t, _select_key(tables, t, cat([one.duration, two.duration])),
                     cat([one.mortality_multiplier, two.mortality_multiplier]),
                     cat([one.flat_extra, two.flat_extra]), cat(anchor))
    life1, life2 = np.arange(size), np.arange(size, 2 * size)
    start1 = fraction_survival(chains.q0[:size], frac[0], assumption)
    start2 = fraction_survival(chains.q0[size:], frac[1], assumption)
    if not (np.all(start1 > 0) and np.all(start2 > 0)):
        raise _Refused  # a life dead at its age: the general path says so
    u = one.deferral
    req = pairs.requires[idx]
    needs_first = req >= 1
    needs_second = req == 2
    # Who must be alive at the deferral (as batch._prepare), where it matters: a start
    # requirement or a guarantee after a deferral.
    alive1, alive2 = np.ones(size), np.ones(size)
    asked = np.flatnonzero((needs_first | (guaranteed > 0)) & (u > 0))
    if asked.size:
        alive1[asked] = (chains.survival(life1[asked], frac[0][asked], u[asked], assumption)
                         / start1[asked])
        alive2[asked] = (chains.survival(life2[asked], frac[1][asked], u[asked], assumption)
                         / start2[asked])
    reach1 = np.where(needs_second, alive2, 1.0)  # scales the first-only state
    reach2 = np.where(needs_first, alive1, 1.0)  # scales the second-only state
    amounts = pairs.amounts[idx]
    m = one.frequency.astype(np.int64)
    mf = one.frequency
    arr = one.timing.astype(np.int64)
    escalation_id, escalations = _ids(one.escalation)
    growth = np.log1p(escalations)[escalation_id]
    values = np.zeros(size)

    has_g = guaranteed > 0
    if has_g.any():
        g = np.flatnonzero(has_g)
        began = np.where(needs_first[g], alive1[g] * np.where(needs_second[g], alive2[g], 1.0),
                         alive1[g] + alive2[g] - alive1[g] * alive2[g])
        whole, part = np.divmod(guaranteed[g], m[g])
        lam = delta - growth[g]
        i = math.expm1(delta)
        advance = arr[g] == 0
        years = whole * phi(0, whole * lam) / phi(0, lam) * annuity_certain(
            i, 1.0, m=mf[g], advance=advance)
        tail = np.where(part > 0, np.exp(-lam * whole)
                        * annuity_certain(i, part / mf[g], m=mf[g], advance=advance), 0.0)
        values[g] = amounts[g, 0] * began * np.exp(-delta * u[g]) * (years + tail)

    first = np.minimum(guaranteed, count)
    live = np.flatnonzero(count > first)
    if not live.size:
        return values
    # W = c1 P1 + c2 P2 + cb P1 P2 with P the unnormalised survivals S(f + t) / C_0.
    c1 = amounts[:, 1] * reach1 / start1
    c2 = amounts[:, 2] * reach2 / start2
    cb = (amounts[:, 0] - amounts[:, 1] - amounts[:, 2]) / (start1 * start2)
    direct = live
    if assumption == "udd":
        annual = live[m[live] == 1]
        if annual.size:
            # (every item: views rather than copies)
            at = slice(None) if annual.size == size else annual
            got, ok = _annual_udd(chains, at, size, frac, u, arr, first, count, growth,
                                  delta, c1, c2, cb)
            values[annual[ok]] += got[ok]
            direct = np.union1d(live[m[live] != 1], annual[~ok])
    if direct.size:
        values[direct] += _per_payment(chains, direct, size, frac, u, arr, m, first, count,
                                       growth, delta, amounts, (reach1, reach2),
                                       (start1, start2), assumption, deadline)
    return values


def _per_payment(chains, live, size, frac, u, arr, m, first, count, growth, delta, amounts,
                 reach, start, assumption, deadline):
    """The life-contingent payments of items ``live``, summed payment by payment with the
    general path's steps (each life's survival, then the states: both alive, only the first,
    only the second), vectorised over the (item, payment) pairs, in chunks."""
    out = np.zeros(size)
    start1, start2 = start
    reach1, reach2 = reach
    for part in _pair_chunks(count[live] - first[live]):
        _on_time(deadline)
        sel = live[part]
        own, j = _expand(sel, first[sel], count[sel])
        mo = m[own]
        t = u[own] + (j + arr[own]) / mo
        p1 = chains.survival(own, frac[0][own], t, assumption) / start1[own]
        p2 = chains.survival(own + size, frac[1][own], t, assumption) / start2[own]
        both = p1 * p2
        a = amounts[own]
        w = (a[:, 0] * both + a[:, 1] * (reach1[own] * p1 - both)
             + a[:, 2] * (reach2[own] * p2 - both))
        # (1 + r)^floor(j/m) / m v^t
        pv = np.exp((j // mo) * growth[own]) / mo * np.exp(-delta * t) * w
        out += np.bincount(own, weights=pv, minlength=size)
    return out[live]


def _annual_udd(chains, items, size, frac, u, arr, first, count, growth, delta, c1, c2, cb):
    """Annual payments under UDD from cumulative columns: return (value, ok) for ``items``.

    Life i's survival at payment j (n = U + arr + j) is (1 - s_i) C_i[j + o_i] +
    s_i C_i[j + o_i + 1] (o_i = n - j + G_i), so with w = v (1 + r) and k = j + o_1 the
    payments j0 <= j < j1 are worth v^(U + arr) w^-o times sums over k of w^k C_i[k] for
    each life, and for the joint term of w^k C_1[k] C_2[k + D] (D = o_2 - o_1), w^k C_1[k]
    C_2[k + D + 1] and w^k C_1[k + 1] C_2[k + D], the fourth product being the first one
    year on: differences of cumulative columns per chain, and per pair of chains and D.
    ``ok`` is False where a difference cancels badly (the caller then sums the payments).
    """
    n0 = np.rint(u[items]).astype(np.int64) + arr[items]
    lw = growth[items] - delta
    lw_id, lw_values = _ids(lw)
    # w^-o and v^n0 for whole o, n0 from tables (an exponential per item costs more than
    # the rest of its arithmetic): row lw_id, column o (o >= 0; o + 1 at most the largest
    # offset plus two).
    top = int(n0.max()) + 3
    back = np.exp(-lw_values[:, None] * np.arange(top)[None, :]).ravel()
    j0, j1 = first[items], count[items]
    parts = []
    for life, f in ((chains.chain[:size][items], frac[0][items]),
                    (chains.chain[size:][items], frac[1][items])):
        big = np.floor(f).astype(np.int64)
        phi_ = f - big
        snap = phi_ >= 1.0 - _SNAP
        big = np.where(snap, big + 1, big)
        s = np.clip(np.where(snap, phi_ - 1.0, phi_), 0.0, 1.0)
        parts.append((life, n0 + big, s))
    cz = chains.columns()
    (ch1, o1, s1), (ch2, o2, s2) = parts
    # Each life on its own chain: one column, two windows a year apart.
    singles = []
    row = lw_id * top
    for coef, o, sv in ((c1[items], o1, s1), (c2[items], o2, s2)):
        scale = coef * back[row + o]
        singles.append([(0, o + j0, o + j1, scale * (1.0 - sv)),
                        (0, o + j0 + 1, o + j1 + 1, coef * sv * back[row + o + 1])])
    one, ok1 = _window_sums(cz, lw_values, np.concatenate([ch1, ch2]), None, None,
                            np.concatenate([lw_id, lw_id]),
                            [(0, *(np.concatenate(z) for z in zip(a[1:], b[1:], strict=True)))
                             for a, b in zip(*singles, strict=True)])
    n = n0.size
    total = one[:n] + one[n:]
    ok = ok1[:n] & ok1[n:]
    magnitude = np.abs(one[:n]) + np.abs(one[n:])
    cb = cb[items]
    if np.any(cb != 0):
        scale = cb * back[row + o1]
        lo, hi = o1 + j0, o1 + j1
        windows = [(0, lo, hi, scale * (1 - s1) * (1 - s2)),
                   (1, lo, hi, scale * (1 - s1) * s2),
                   (2, lo, hi, scale * s1 * (1 - s2)),
                   (0, lo + 1, hi + 1, cb * back[row + o1 + 1] * s1 * s2)]
        joint, ok2 = _window_sums(cz, lw_values, ch1, ch2, o2 - o1, lw_id, windows)
        total += joint
        magnitude += np.abs(joint)
        ok &= ok2
    # The terms (the lives alone, the joint one) cancel too much: the payments are summed
    # by state as the general path sums them (a value it finds to be 0 stays 0).
    ok &= magnitude <= _CANCELLATION * np.abs(total)
    discount = np.exp(-delta * np.arange(top))
    return discount[n0] * total, ok


def _ids(values):
    """(id of each value among the distinct values, the distinct values)."""
    if values.size and np.all(values == values[0]):
        return np.zeros(values.size, dtype=np.int64), values[:1]
    distinct, inverse = np.unique(values, return_inverse=True)
    return inverse.astype(np.int64), distinct


def _codes(code):
    """(distinct codes ascending, index of each code among them) for codes >= 0: by a
    table of the codes' range where it is small, else by sorting."""
    top = int(code.max()) + 1 if code.size else 0
    if top > 4 * code.size + 65_536:
        uniq, inv = np.unique(code, return_inverse=True)
        return uniq, inv.reshape(-1)
    present = np.zeros(top, dtype=bool)
    present[code] = True
    uniq = np.flatnonzero(present)
    ids = np.cumsum(present) - 1
    return uniq, ids[code]


def _window_sums(cz, lw_values, ch_a, ch_b, d, lw_id, windows):
    """Per term, sum over its windows (col, lo, hi, coef) of coef sum_(lo <= k < hi) of
    column col of its key: e^(k lw) C_a[k] (one column) where ``ch_b`` is None, else
    e^(k lw) times C_a[k] C_b[k + d], C_a[k] C_b[k + d + 1] and C_a[k + 1] C_b[k + d].

    Columns are built once per distinct key (chains, d, lw), in groups to bound memory, and
    each sum is a difference of suffix sums (nothing is subtracted for a window that runs to
    the end of the chain); ok is False where what is subtracted exceeds _CANCELLATION times
    the result."""
    width = cz.shape[1]
    kinds = lw_values.size
    chains = cz.shape[0]
    if ch_b is None:
        code = ch_a * kinds + lw_id
        spread = low = 0
    else:
        low = int(d.min())
        spread = int(d.max()) - low + 1
        code = ((ch_a * chains + ch_b) * spread + (d - low)) * kinds + lw_id
    uniq, inv = _codes(code)
    out = np.zeros(code.size)
    taken = np.zeros(code.size)
    ncols = 1 if ch_b is None else 3
    group = max(1, _CHUNK_CELLS // (width * ncols))
    if uniq.size > group:
        order = np.argsort(inv, kind="stable")
        bounds = np.searchsorted(inv[order], np.arange(0, uniq.size + group, group))
    k = np.arange(width)
    grow = np.exp(lw_values[:, None] * k[None, :])  # e^(k lw) for each distinct lw
    if ch_b is not None:
        # C_b[k + shift] and C_b[k + shift + 1] read from rows padded with zeros.
        pad = max(-low, 0) + 1
        padded = np.zeros((chains, width + pad + max(low + spread, 0) + 1))
        padded[:, pad:pad + width] = cz
    for g in range(0, uniq.size, group):
        keys = uniq[g:g + group]
        rest = keys // kinds
        w = grow[keys % kinds]
        if ch_b is None:
            x = (cz[rest] * w)[:, None, :]
        else:
            shift = rest % spread + low
            pair = rest // spread
            first = cz[pair // chains] * w
            at = (pad + shift)[:, None] + k[None, :]
            second = (pair % chains)[:, None]
            b0 = padded[second, at]
            b1 = padded[second, at + 1]
            x = np.empty((keys.size, 3, width))
            np.multiply(first, b0, out=x[:, 0])
            np.multiply(first, b1, out=x[:, 1])
            x[:, 2, -1] = 0.0
            # C_a[k + 1] C_b[k + shift] e^(k lw): the next year's C_a, discounted one year less
            np.multiply(cz[pair // chains, 1:], b0[:, :-1], out=x[:, 2, :-1])
            x[:, 2, :-1] *= w[:, :-1]
        suffix = np.empty(x.shape[:2] + (width + 1,))
        suffix[:, :, -1] = 0.0
        np.cumsum(x[:, :, ::-1], axis=2, out=suffix[:, :, -2::-1])
        if uniq.size > group:
            sel = order[bounds[g // group]:bounds[g // group + 1]]
        else:
            sel = slice(None)
        row = inv[sel] - g
        flat = suffix.ravel()
        row_base = row * (ncols * (width + 1))
        places = {}  # (lo, hi) -> where their suffix sums are, for column 0
        for col, lo, hi, coef in windows:
            key = (id(lo), id(hi))
            if key not in places:
                a = np.clip(lo[sel], 0, width)
                places[key] = (row_base + a, row_base + np.clip(hi[sel], a, width))
            at_a, at_b = places[key]
            if col:
                at_a, at_b = at_a + col * (width + 1), at_b + col * (width + 1)
            after = flat[at_b]
            c = coef[sel]
            out[sel] += c * (flat[at_a] - after)
            if after.any():
                taken[sel] += np.abs(c) * after
    # (the windows of a term have coefficients of one sign)
    return out, taken <= _CANCELLATION * np.abs(out)


# ---------------------------------------------------------------------------------------------
# Two-life items given as columns

#: The second life's columns (as the first life's in Columns.FIELDS, suffixed 2).
SECOND_FIELDS = ("table2", "age2", "duration2", "age_adjustment2", "mortality_multiplier2",
                 "flat_extra2")
#: The survivorship amounts' columns (as the JSON survivorship object's keys).
AMOUNT_FIELDS = ("both", "first_only", "second_only")
#: Every column of a :class:`JointColumns` beyond :data:`service.engine.columns.FIELDS`.
JOINT_FIELDS = (*SECOND_FIELDS, *AMOUNT_FIELDS, "start_requires")
_JOINT_DEFAULTS = {"table2": 0, "age2": math.nan, "duration2": math.nan,
                   "age_adjustment2": 0.0, "mortality_multiplier2": 1.0, "flat_extra2": 0.0,
                   "both": 1.0, "first_only": 1.0, "second_only": 1.0,
                   "start_requires": "any"}


@dataclass(frozen=True, eq=False)
class JointColumns:
    """One- and two-life annuity items, one array per field (all the same length).

    ``first`` holds the first life and the payments, as :class:`Columns`; the second life's
    fields are those of the first suffixed 2 (``table2``, ``age2``, ``duration2``, ...), a
    NaN ``age2`` marking a single-life row (its other second-life fields are then not
    read). ``both``, ``first_only`` and ``second_only`` are the survivorship amounts
    (default 1, 1, 1: last survivor); ``start_requires`` holds codes indexing
    START_REQUIREMENTS (0 any, 1 first, 2 both; -1 an unknown requirement).
    Build with :meth:`from_dict`, :meth:`from_frame` or :meth:`from_items`.
    """

    first: Columns
    table2: np.ndarray
    age2: np.ndarray
    duration2: np.ndarray
    age_adjustment2: np.ndarray
    mortality_multiplier2: np.ndarray
    flat_extra2: np.ndarray
    both: np.ndarray
    first_only: np.ndarray
    second_only: np.ndarray
    start_requires: np.ndarray

    def __post_init__(self):
        shapes = {getattr(self, name).shape for name in JOINT_FIELDS}
        if shapes != {(len(self.first),)}:
            raise ValueError("every column must be one-dimensional and of the same length")

    def __len__(self) -> int:
        return len(self.first)

    @property
    def two(self) -> np.ndarray:
        """Which rows have two lives."""
        return ~np.isnan(self.age2)

    @property
    def second(self) -> Columns:
        """The second life with the payments, as :class:`Columns` (NaN ages on single-life
        rows)."""
        f = self.first
        return Columns(self.table2, self.age2, self.duration2, self.age_adjustment2,
                       self.mortality_multiplier2, self.flat_extra2, f.timing, f.frequency,
                       f.term, f.deferral, f.guarantee, f.escalation)

    @property
    def amounts(self) -> np.ndarray:
        """The survivorship amounts, (n, 3)."""
        return np.column_stack([self.both, self.first_only, self.second_only])

    @classmethod
    def from_dict(cls, data: Mapping) -> "JointColumns":
        """Build from a mapping of field name to array (or scalar, broadcast): the columns
        of :meth:`Columns.from_dict` plus those of :data:`JOINT_FIELDS`, which default to a
        single life (``age2`` NaN), the second life's fields as the first's, last-survivor
        amounts and start requirement 'any'. ``start_requires`` may be strings or codes; a
        null ``table2`` is allowed on single-life rows."""
        unknown = set(data) - set(FIELDS) - set(JOINT_FIELDS)
        if unknown:
            raise ValueError(f"unknown columns: {', '.join(sorted(unknown))}")
        first = Columns.from_dict({k: v for k, v in data.items() if k in FIELDS})
        size = len(first)
        out = {}
        for name in JOINT_FIELDS:
            value = np.asarray(data.get(name, _JOINT_DEFAULTS[name]))
            if value.ndim == 0:
                value = np.full(size, value.item())
            if name == "start_requires":
                out[name] = _requirement_codes(value)
                continue
            with np.errstate(invalid="ignore"):
                out[name] = np.array(value, dtype=float)  # None becomes NaN
        two = ~np.isnan(out["age2"])
        table = out["table2"]
        if not np.all(~two | (np.isfinite(table) & (table == np.round(table)))):
            raise ValueError("the column 'table2' must hold whole numbers")
        out["table2"] = np.where(two, np.nan_to_num(table), 0).astype(np.intp)
        for arr in out.values():
            arr.setflags(write=False)
        return cls(first, **out)

    @classmethod
    def from_frame(cls, frame) -> "JointColumns":
        """Build from a pandas DataFrame whose columns are named as in :meth:`from_dict`."""
        return cls.from_dict({name: frame[name].to_numpy() for name in frame.columns})

    @classmethod
    def from_items(cls, items) -> "JointColumns":
        """Build from engine :class:`Item` objects of one or two lives (ValueError
        otherwise)."""
        rows, seconds = [], []
        nan = math.nan
        for n, item in enumerate(items):
            if not 1 <= len(item.lives) <= 2:
                raise ValueError(f"item {n} has neither one nor two lives")
            rows.append(_item_row(replace(item, lives=item.lives[:1])))
            b = item.lives[1] if len(item.lives) == 2 else None
            req = item.start_requires
            seconds.append(
                (0, nan, nan, 0.0, 1.0, 0.0) if b is None else  # (from_dict's defaults)
                (b.table, b.age, nan if b.duration is None else b.duration, b.age_adjustment,
                 b.mortality_multiplier, b.flat_extra))
            seconds[-1] += (*item.survivorship,
                            _REQUIREMENT_CODE[req] if req in _REQUIREMENT_CODE else -1)
        first = _from_rows(rows)
        cols = (np.array(seconds, dtype=float).reshape(len(rows), len(JOINT_FIELDS)).T)
        out = {name: np.array(col) for name, col in zip(JOINT_FIELDS, cols, strict=True)}
        out["table2"] = np.nan_to_num(out["table2"]).astype(np.intp)
        out["start_requires"] = out["start_requires"].astype(np.int8)
        for arr in out.values():
            arr.setflags(write=False)
        return cls(first, **out)

    def take(self, index) -> "JointColumns":
        """The items at ``index`` (an integer array or boolean mask)."""
        return JointColumns(self.first.take(index),
                            **{name: getattr(self, name)[index] for name in JOINT_FIELDS})

    def to_items(self) -> list[Item]:
        """The items as engine objects (for the general path)."""
        return [self._item(n) for n in range(len(self))]

    def _item(self, n: int) -> Item:
        item = _row_item(self.first, n)
        lives = item.lives
        if not math.isnan(self.age2[n]):
            d = float(self.duration2[n])
            lives = (*lives, Life(age=float(self.age2[n]), table=int(self.table2[n]),
                                  duration=None if math.isnan(d) else _whole_or_float(d),
                                  age_adjustment=float(self.age_adjustment2[n]),
                                  mortality_multiplier=float(self.mortality_multiplier2[n]),
                                  flat_extra=float(self.flat_extra2[n])))
        code = int(self.start_requires[n])
        return Item(lives, item.payments,
                    (float(self.both[n]), float(self.first_only[n]), float(self.second_only[n])),
                    START_REQUIREMENTS[code] if 0 <= code < len(START_REQUIREMENTS)
                    else "unknown")


def _requirement_codes(value) -> np.ndarray:
    if value.dtype.kind in "iuf":
        codes = np.asarray(value, dtype=float)
        ok = np.isin(codes, range(len(START_REQUIREMENTS)))
        return np.where(ok, codes, -1).astype(np.int8)
    text = value.astype(str)
    return np.select([text == name for name in START_REQUIREMENTS],
                     range(len(START_REQUIREMENTS)), -1).astype(np.int8)


def is_joint(columns) -> bool:
    """Whether ``columns`` (given to value_columns) holds two-life columns: a
    :class:`JointColumns`, or a mapping or DataFrame with any of :data:`JOINT_FIELDS`."""
    if isinstance(columns, JointColumns):
        return True
    if isinstance(columns, Columns):
        return False
    names = columns.keys() if isinstance(columns, Mapping) else getattr(columns, "columns", ())
    return any(name in JOINT_FIELDS for name in names)


def _as_joint(columns) -> JointColumns:
    if isinstance(columns, JointColumns):
        return columns
    if isinstance(columns, Mapping):
        return JointColumns.from_dict(columns)
    return JointColumns.from_frame(columns)


def problems(tables, cols: JointColumns, valuation: Valuation) -> dict[str, list[str]]:
    """Return the ItemError paths and messages the general path gives these items (empty
    when there is none): rows that may fail (array checks, a superset) are built as Items and
    prepared by the general path, whose paths are then placed in the whole batch. (Its
    stages, each item's checks, then table indices, then the lives under their tables, are
    batch-wide, so the suspects alone give the batch's problems.)"""
    first, second, two = cols.first, cols.second, cols.two
    amounts = cols.amounts
    with np.errstate(invalid="ignore"):
        suspect = (_field_suspects(first) | (two & _field_suspects(second))
                   | ~np.all((amounts >= 0) & (amounts <= 1), axis=1)
                   | ~np.isin(cols.start_requires, range(len(START_REQUIREMENTS))))
    n_tables = len(tables)
    suspect |= ~((first.table >= 0) & (first.table < n_tables))
    suspect |= two & ~((second.table >= 0) & (second.table < n_tables))
    assumption = valuation.fractional_age
    for life, rows in ((first, ~suspect), (second, ~suspect & two)):
        ok = np.flatnonzero(rows)
        if ok.size == len(cols):  # (every row: no copies)
            suspect |= _life_suspects(tables, life, assumption)
        elif ok.size:
            suspect[ok] |= _life_suspects(tables, life.take(ok), assumption)
    rows = np.flatnonzero(suspect).tolist()
    if not rows:
        return {}
    found = _found(tables, [cols._item(n) for n in rows], valuation)
    out = {}
    for path, msgs in found.items():
        at, _, rest = path.partition(".")
        out[f"{rows[int(at)]}.{rest}"] = msgs
    return out


def value_joint_columns(tables, columns, valuation: Valuation, *, max_work: int | None = None,
                        deadline: float | None = None) -> Values:
    """Return the present value of 1 p.a. of each item of ``columns`` (a
    :class:`JointColumns`, or a mapping or DataFrame of its columns), and its method code,
    as :func:`service.engine.columns.value_columns` (which sends two-life columns here).

    Two-life rows with discrete payments under a flat rate (annual, or any whole frequency
    with exact sums) go straight to this module's arrays (no Item objects); single-life rows
    to the column path; the rest to the general path. Errors are the general path's.
    """
    cols = _as_joint(columns)
    found = problems(tables, cols, valuation)
    if found:
        raise ItemError(found)
    size = len(cols)
    two = cols.two
    timing, frequency = cols.first.timing, cols.first.frequency
    fast = two & np.isin(timing, (0, 1)) & (
        (valuation.approximation == "exact") | (frequency == 1))
    if valuation.curve.kind != "flat":
        fast[:] = False
    values = np.zeros(size)
    code = np.full(size, EXACT_SUM, dtype=np.int8)
    pairs = None
    fast_work = 0
    if fast.any():
        every = bool(fast.all())
        sub = cols if every else cols.take(fast)
        pairs = _Pairs(sub.first, sub.second, sub.amounts, sub.start_requires)
        count, guaranteed, fast_work = _fast_work(tables, pairs)
        if max_work is not None and fast_work > max_work:
            raise WorkLimitError(fast_work, max_work)
    done = fast_work
    for rows, how in ((np.flatnonzero(~two), "columns"), (np.flatnonzero(two & ~fast), "items")):
        if not rows.size:
            continue
        if how == "columns":
            got = _within(done, max_work, lambda left, rows=rows: value_columns(
                tables, cols.first.take(rows), valuation, max_work=left, deadline=deadline))
            done += int(_column_work(tables, cols.first.take(rows),
                                     valuation.fractional_age).sum())
        else:
            got = _within(done, max_work, lambda left, rows=rows: annuity.value_annuities(
                tables, cols.take(rows).to_items(), valuation, max_work=left,
                deadline=deadline, fast=False))
        values[rows] = got.value
        code[rows] = got.method_code
    if pairs is not None:
        try:
            values[fast] = _value(tables, pairs, count, guaranteed, valuation, deadline)
        except _Refused:  # (not reached unless the checks disagree)
            _prepare(tables, cols.to_items(), valuation)  # the general path's ItemError
            raise
    return Values(values, code, methods(valuation))
