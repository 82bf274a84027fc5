"""Single-life annuities valued from columns, on shared chains of survival.

A batch given as columns (:class:`Columns`: one numpy array per field) is valued without a
Python object per item, and :func:`service.engine.annuity.value_annuities` sends the items
this module covers here too (see :func:`dispatch`). The results are those of the general
path (payment by payment) to rounding.

Derivation (flat force of interest delta, v = e^-delta; escalation r, growth g = ln(1 + r))
--------------------------------------------------------------------------------------------
A life aged x = a + f (a its integer age, 0 <= f < 1) has the chain q_k = q(a + k) of its
table (select rates first, multiplier and flat extra applied, q = 1 from the table's last
age), C_k = prod_{j<k} (1 - q_j) and S(k + s) = C_k s_p(a+k) for 0 <= s <= 1; it survives
t years with probability S(f + t) / S(f).

With m payments a year, a deferral of U/m years and arr = 1 in arrears (0 in advance),
payment j falls at period n = U + arr + j, at t = n / m, of (1 + r)^floor(j/m) / m. Write
G = floor(f m) and phi = f m - G (an age within 1e-9 of the next 1/m is taken as it, as the
general path does: then G is one more and phi slightly negative). Then f + n/m = K + s_i
with (K, i) = divmod(n + G, m) and s_i = (phi + i) / m, clipped to [0, 1]: every year of
age has the same m slots i, at the same fractions s_i. With D = G + U + arr = m dq + dm,
floor(j / m) = K - dq - [i < dm], so the payment is worth

    w^K c_i S(K + s_i),   w = v (1 + r),   c_i = v^((i - G)/m) (1 + r)^(-dq) e_i,

with e_i = 1 / (1 + r) for i < dm and 1 otherwise (all over m S(f)).

Under UDD S(K + s) = (1 - s) C_K + s C_(K+1), so a year K whose slots [lo, hi) are paid
contributes w^K (A C_K + B C_(K+1)) with A = sum c_i (1 - s_i) and B = sum c_i s_i over
the slots. With x = v^(1/m) and the shared prefix tables P0[k] = sum_(i<k) x^i and
P1[k] = sum_(i<k) i x^i (one pair per frequency), A and B of any slot range take O(1):
sum c_i = kappa S0 and sum c_i s_i = kappa (phi S0 + S1) / m, where S0, S1 are the P0, P1
differences over the range, split at dm (weight 1 / (1 + r) before it) and
kappa = v^(-G/m) (1 + r)^(-dq); the clipped first slot, when phi < 0, is added back.

An item's life-contingent payments run from its first unguaranteed period to its last: a
first year (slots from ia), a last year (slots to ib) and whole years between, which
contribute A_full M0 + B_full M1 with M0 = sum_K w^K C_K and M1 = sum_K w^K C_(K+1) over
those years: differences of cumulative columns of each chain (prefix or suffix sums,
whichever subtracts less). Chains are shared by the items with the same (table, select
duration, multiplier, flat extra, integer age, escalation); an item whose difference would
cancel badly (the subtracted part over 64 times the result) sums its whole years directly.

Under a constant force or Balducci's assumption S(K + s) is not linear in s: each year of
each item sums its slots directly (a per-year pass, vectorised over items and years).

The guarantee (g m payments made for certain once the life is alive at the deferral u) is
P(alive at u) v^u times sum_k ((1 + r) v)^k a(1) over its whole years, a(1) the
annuity-certain of one year paid m-thly, plus its part year; the geometric sum is taken in
closed form.

Continuous payments (timing code 2; their frequency is ignored, as by the general path) are
valued by :mod:`service.engine.continuous_columns` on the same kind of chains, under every
fractional-age assumption, with the general path's method code (INTEGRAL).

Not covered here: two lives (:mod:`service.engine.joint_columns`, which also takes them as
columns through :func:`value_columns`); the general path values interest structures other than
one flat rate, Woolhouse's approximation with m > 1 (discrete payments), and items whose
sensitivities are wanted.
"""

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from service.engine import annuity, small
from service.engine.annuity import Values
from service.engine.batch import _check_items, _expand, _on_time, _prepare
from service.engine.checks import _check_item
from service.engine.errors import ItemError, WorkLimitError
from service.engine.integrals import phi
from service.engine.items import (
    EXACT_SUM,
    INTEGRAL,
    LAST_SURVIVOR,
    MAX_FREQUENCY,
    START_REQUIREMENTS,
    Item,
    Life,
    Payments,
    Valuation,
    methods,
)
from service.engine.survival import between, build_lives, fraction_survival

#: Timing codes of :attr:`Columns.timing`; any other code is an invalid timing.
TIMING_CODES = ("advance", "arrears", "continuous")
#: The code of continuous payments.
CONTINUOUS = 2
FIELDS = ("table", "age", "duration", "age_adjustment", "mortality_multiplier", "flat_extra",
          "timing", "frequency", "term", "deferral", "guarantee", "escalation")
_DEFAULTS = {"table": 0, "duration": math.nan, "age_adjustment": 0.0,
             "mortality_multiplier": 1.0, "flat_extra": 0.0, "timing": "advance",
             "frequency": 1, "term": math.inf, "deferral": 0.0, "guarantee": 0.0,
             "escalation": 0.0}
_SNAP = 1e-9  # as service.engine.survival
_EPS = 1e-9  # as service.engine.annuity
#: Items valued at once (their chains and slot sums are built per chunk).
_CHUNK_ITEMS = 16_384
#: (item, year) pairs summed at once by the per-year passes.
_CHUNK_PAIRS = 200_000
#: An item whose cumulative difference subtracts more than this many times its value sums
#: its whole years directly instead.
_CANCELLATION = 64.0
#: A slot range whose sum of c_i (1 - s_i) is below this share of its sum of c_i is summed
#: slot by slot (see _Slots.weights).
_ILL = 1e-3


@dataclass(frozen=True, eq=False)
class Columns:
    """Single-life annuity items, one array per field (all the same length).

    ``table`` indexes the tables; ``duration`` is NaN for ultimate; ``timing`` holds codes
    (0 advance, 1 arrears, 2 continuous, see ``TIMING_CODES``; -1 an unknown timing);
    ``frequency`` is payments a year (whole numbers; ignored for continuous payments);
    ``term`` is inf for life. Amounts are per 1 p.a.
    Build with :meth:`from_dict`, :meth:`from_frame` or :meth:`from_items`.
    """

    table: np.ndarray
    age: np.ndarray
    duration: np.ndarray
    age_adjustment: np.ndarray
    mortality_multiplier: np.ndarray
    flat_extra: np.ndarray
    timing: np.ndarray
    frequency: np.ndarray
    term: np.ndarray
    deferral: np.ndarray
    guarantee: np.ndarray
    escalation: np.ndarray

    def __post_init__(self):
        sizes = {getattr(self, name).shape for name in FIELDS}
        if len(sizes) != 1 or len(next(iter(sizes))) != 1:
            raise ValueError("every column must be one-dimensional and of the same length")

    def __len__(self) -> int:
        return self.age.size

    @classmethod
    def from_dict(cls, data: Mapping) -> "Columns":
        """Build from a mapping of field name to array (or scalar, broadcast).

        ``age`` is required; the others default as in the JSON items (table 0, ultimate,
        advance, annual, for life, no deferral, guarantee or escalation). ``timing`` may be
        strings or codes; a null (NaN) ``term`` is for life and a null ``duration`` ultimate.
        """
        unknown = set(data) - set(FIELDS)
        if unknown:
            raise ValueError(f"unknown columns: {', '.join(sorted(unknown))}")
        if "age" not in data:
            raise ValueError("the column 'age' is required")
        size = np.asarray(data["age"]).size
        raw = {name: np.asarray(data.get(name, _DEFAULTS.get(name)))
               for name in FIELDS}
        out = {}
        for name, value in raw.items():
            if value.ndim == 0:
                value = np.full(size, value.item())
            if name == "timing":
                out[name] = _timing_codes(value)
            elif name == "table":
                table = np.asarray(value, dtype=float)
                if not np.all(np.isfinite(table) & (table == np.round(table))):
                    raise ValueError("the column 'table' must hold whole numbers")
                out[name] = table.astype(np.intp)
            else:
                with np.errstate(invalid="ignore"):
                    arr = np.array(value, dtype=float)  # None becomes NaN
                if name == "term":
                    arr = np.where(np.isnan(arr), np.inf, arr)
                out[name] = arr
        for arr in out.values():
            arr.setflags(write=False)
        return cls(**out)

    @classmethod
    def from_frame(cls, frame) -> "Columns":
        """Build from a pandas DataFrame whose columns are named like the JSON fields (plus
        ``table``, the index of the life's table); ``timing`` as strings."""
        return cls.from_dict({name: frame[name].to_numpy() for name in frame.columns})

    @classmethod
    def from_items(cls, items) -> "Columns":
        """Build from engine :class:`~service.engine.annuity.Item` objects, each with one life
        (ValueError otherwise)."""
        rows = []
        for n, item in enumerate(items):
            row = _item_row(item)
            if row is None:
                raise ValueError(f"item {n} is not a single-life item")
            rows.append(row)
        return _from_rows(rows)

    def take(self, index) -> "Columns":
        """The items at ``index`` (an integer array or boolean mask)."""
        return Columns(**{name: getattr(self, name)[index] for name in FIELDS})

    def to_items(self) -> list[Item]:
        """The items as engine objects (for the general path)."""
        return [_row_item(self, n) for n in range(len(self))]


class ItemBatch(Sequence):
    """A batch of engine items held partly as columns: the items at ``rows`` (ascending
    places) are single-life items with start_requires 'any' and the usual
    survivorship, given by ``columns``; the others are :class:`Item` objects in ``others``
    (by place). Indexing gives each place's :class:`Item` (built on demand), so it serves
    wherever a list of items does; :func:`dispatch` values the column rows without one."""

    def __init__(self, size: int, rows: np.ndarray, columns: Columns,
                 others: Mapping[int, Item]):
        if len(rows) != len(columns) or len(rows) + len(others) != size:
            raise ValueError("the rows and the other items must fill the batch")
        self.size, self.rows, self.columns = size, np.asarray(rows, dtype=np.intp), columns
        self.others = dict(others)
        self._row_of = dict(zip(self.rows.tolist(), range(len(self.rows)), strict=True))

    def __len__(self) -> int:
        return self.size

    def __getitem__(self, n):
        if isinstance(n, slice):
            return [self[k] for k in range(*n.indices(self.size))]
        if n < 0:
            n += self.size
        row = self._row_of.get(n)
        if row is None:
            if n not in self.others:
                raise IndexError(n)
            return self.others[n]
        return _row_item(self.columns, row)


def _timing_codes(value) -> np.ndarray:
    if value.dtype.kind in "iuf":
        codes = np.asarray(value, dtype=float)
        ok = np.isin(codes, (0, 1, CONTINUOUS))
        return np.where(ok, codes, -1).astype(np.int8)
    text = value.astype(str)
    return np.select([text == name for name in TIMING_CODES], range(len(TIMING_CODES)),
                     -1).astype(np.int8)


def _item_row(item) -> tuple | None:
    """The columns of one item, or None where it is not single-life (a continuous item's
    frequency, which nothing reads, is kept where it is a whole number and 1 otherwise)."""
    if len(item.lives) != 1:
        return None
    p = item.payments
    code = TIMING_CODES.index(p.timing) if p.timing in TIMING_CODES else -1
    frequency = p.frequency
    if code == CONTINUOUS and type(frequency) is not int:
        frequency = 1
    life = item.lives[0]
    return (life.table, life.age, math.nan if life.duration is None else life.duration,
            life.age_adjustment, life.mortality_multiplier, life.flat_extra, code,
            frequency, math.inf if p.term is None else p.term, p.deferral, p.guarantee,
            p.escalation)


def _from_rows(rows) -> Columns:
    if not rows:
        cols = [np.zeros(0) for _ in FIELDS]
    else:
        cols = [np.array(c) for c in zip(*rows, strict=True)]
    out = {}
    for name, arr in zip(FIELDS, cols, strict=True):
        if name == "table":
            arr = arr.astype(np.intp)
        elif name == "timing":
            arr = arr.astype(np.int8)
        else:
            arr = arr.astype(float)
        arr.setflags(write=False)
        out[name] = arr
    return Columns(**out)


def _whole_or_float(value: float):
    return int(value) if math.isfinite(value) and float(value).is_integer() else float(value)


def _row_item(cols: Columns, n: int) -> Item:
    d = float(cols.duration[n])
    code = int(cols.timing[n])
    term = float(cols.term[n])
    life = Life(age=float(cols.age[n]), table=int(cols.table[n]),
                duration=None if math.isnan(d) else _whole_or_float(d),
                age_adjustment=float(cols.age_adjustment[n]),
                mortality_multiplier=float(cols.mortality_multiplier[n]),
                flat_extra=float(cols.flat_extra[n]))
    pay = Payments(timing=TIMING_CODES[code] if 0 <= code < len(TIMING_CODES) else "unknown",
                   frequency=_whole_or_float(float(cols.frequency[n])),
                   term=None if term == math.inf else term, deferral=float(cols.deferral[n]),
                   guarantee=float(cols.guarantee[n]), escalation=float(cols.escalation[n]))
    return Item((life,), pay)


# ---------------------------------------------------------------------------------------------
# Validation: the general path's problems, found with array tests and worded by its own checks


def _multiple(value, m):
    scaled = value * m
    with np.errstate(invalid="ignore"):
        return np.abs(scaled - np.round(scaled)) <= _EPS * np.maximum(1.0, np.abs(scaled))


def _field_suspects(cols: Columns) -> np.ndarray:
    """Rows that may fail the general path's item checks (a superset)."""
    m = cols.frequency
    cont = cols.timing == CONTINUOUS  # (no frequency, no whole periods)
    with np.errstate(invalid="ignore"):
        good_m = (m == np.round(m)) & (m >= 1) & (m <= MAX_FREQUENCY)
        timing = cols.timing  # (np.isin, for three codes, costs more than three tests)
        bad = ~((timing == 0) | (timing == 1) | cont) | ~(good_m | cont)
        for v in (cols.deferral, cols.guarantee):
            bad |= ~(np.isfinite(v) & (v >= 0))
        life = np.isinf(cols.term) & (cols.term > 0)
        bad |= ~(life | (np.isfinite(cols.term) & (cols.term > 0)))
        bad |= ~(np.isfinite(cols.escalation) & (cols.escalation > -1))
        bad |= ~life & (cols.guarantee > cols.term * (1 + 1e-12))
        safe_m = np.where(good_m, m, 1.0)
        for v in (np.where(life, 0.0, cols.term), cols.deferral, cols.guarantee):
            bad |= ~cont & ~_multiple(v, safe_m)
        bad |= ~np.isfinite(cols.age + cols.age_adjustment)
        mult = cols.mortality_multiplier
        bad |= ~(np.isfinite(mult) & (mult >= 0))
        bad |= ~((cols.flat_extra >= 0) & (cols.flat_extra <= 1))
        d = cols.duration
        bad |= ~np.isnan(d) & ~((d == np.round(d)) & (d >= 0) & np.isfinite(d))
    return bad


def problems(tables, cols: Columns, assumption: str) -> dict[str, list[str]]:
    """Return the ItemError paths and messages the general path gives these items (empty
    when there is none): the item checks, then a table index out of range, then the lives'
    problems under the tables; each stage only when the ones before found nothing."""
    errors: dict[str, list[str]] = {}
    for n in np.flatnonzero(_field_suspects(cols)).tolist():
        for path, msgs in _check_item(_row_item(cols, n)).items():
            errors.setdefault(f"{n}.{path}", []).extend(msgs)
    if errors:
        return errors
    bad_table = ~((cols.table >= 0) & (cols.table < len(tables)))
    if bad_table.any():
        return {f"{n}.lives.0.sex": ["no table for this life in the basis"]
                for n in np.flatnonzero(bad_table).tolist()}
    suspects = np.flatnonzero(_life_suspects(tables, cols, assumption))
    if not suspects.size:
        return {}
    sub = cols.take(suspects)
    _, found = build_lives(tables, sub.table, sub.age + sub.age_adjustment,
                           np.where(np.isnan(sub.duration), np.inf, sub.duration),
                           sub.mortality_multiplier, assumption, sub.flat_extra)
    return {f"{int(suspects[pos])}.lives.0.{field}": [msg]
            for pos, (field, msg) in sorted(found.items())}


def _life_suspects(tables, cols: Columns, assumption: str) -> np.ndarray:
    """Lives that may be impossible under their tables (a superset of build_lives' finds):
    outside the table's ages, selected outside the select table, or dead at their age."""
    ages = cols.age + cols.age_adjustment
    t = cols.table
    flat = _flat_rates(tuple(tables))
    lo, hi = flat.first[t], flat.last[t]
    outside = ~((ages >= lo - _SNAP) & (ages <= hi + _SNAP))
    anchor = np.where(outside, lo, np.floor(ages + _SNAP).astype(np.int64))
    dkey = _select_key(tables, t, cols.duration)
    # Selected outside the select table's ages (select tables only have dkey >= 0).
    sel = anchor - dkey
    first = flat.select_first[t]
    suspect = outside | ((dkey >= 0) & ((sel < first) | (sel >= first + flat.select_rows[t])))
    ok = ~suspect
    # (Under UDD no life is dead at its age: 1 - f q >= 1 - f > 0, the fraction f < 1.)
    if ok.any() and assumption != "udd":
        q0 = _year_rates(tables, t[ok], anchor[ok], dkey[ok], cols.mortality_multiplier[ok],
                         cols.flat_extra[ok], np.zeros(int(ok.sum()), dtype=np.int64))
        frac = np.maximum(ages[ok] - anchor[ok], 0.0)
        suspect[ok] = fraction_survival(q0, frac, assumption) <= 0
    return suspect


def _select_key(tables, t, duration) -> np.ndarray:
    """The whole select duration where the life is in its select period, else -1."""
    period = _flat_rates(tuple(tables)).period[t]
    with np.errstate(invalid="ignore"):
        selected = (duration >= 0) & (duration < period)  # (False for NaN and inf)
    return np.where(selected, duration, -1).astype(np.int64)


def _year_rates(tables, t, anchor, dkey, mult, extra, k):
    """q of year ``k`` (offset from the integer age ``anchor``) of each life, arrays
    broadcast: select rates within the select period, the multiplier and flat extra applied
    and capped at 1, and q = 1 from the table's last age (as build_lives)."""
    t, anchor, dkey, mult, extra, k = np.broadcast_arrays(t, anchor, dkey, mult, extra, k)
    flat = _flat_rates(tuple(tables))
    age = anchor + k
    base = flat.q[flat.offset[t] + between(age - flat.first[t], 0, flat.length[t] - 1)]
    if flat.select is not None:
        period = flat.period[t]
        dur = dkey + k
        sel = (dkey >= 0) & (dur < period)
        if sel.any():
            srow = between(anchor - dkey - flat.select_first[t], 0, flat.select_rows[t] - 1)
            at = flat.select_offset[t] + srow * period + between(dur, 0, period - 1)
            base = np.where(sel, flat.select[np.where(sel, at, 0)], base)
    return np.where(age >= flat.last[t], 1.0, np.minimum(base * mult + extra, 1.0))


@dataclass(frozen=True, eq=False)
class _FlatRates:
    """Every table's ultimate rates end to end, and its select rates flattened row by row,
    with each table's offsets, ages and sizes (indexed by table)."""

    q: np.ndarray
    offset: np.ndarray
    first: np.ndarray
    length: np.ndarray
    last: np.ndarray
    select: np.ndarray | None  # None where no table has select rates
    select_offset: np.ndarray
    select_first: np.ndarray
    select_rows: np.ndarray
    period: np.ndarray


@lru_cache(maxsize=32)
def _flat_rates(tables: tuple) -> _FlatRates:
    lengths = [len(tb.q) for tb in tables]
    sizes = [tb.select_q.size if tb.select_period else 0 for tb in tables]
    flat = [tb.select_q.ravel() for tb, size in zip(tables, sizes, strict=True) if size]
    return _FlatRates(
        q=np.concatenate([tb.q for tb in tables]),
        offset=np.concatenate([[0], np.cumsum(lengths)[:-1]]).astype(np.int64),
        first=np.array([tb.first_age for tb in tables], dtype=np.int64),
        length=np.array(lengths, dtype=np.int64),
        last=np.array([tb.last_age for tb in tables], dtype=np.int64),
        select=np.concatenate(flat) if flat else None,
        select_offset=np.concatenate([[0], np.cumsum(sizes)[:-1]]).astype(np.int64),
        select_first=np.array([tb.select_first_age for tb in tables], dtype=np.int64),
        select_rows=np.array([max(tb.select_q.shape[0], 1) for tb in tables], dtype=np.int64),
        period=np.array([tb.select_period for tb in tables], dtype=np.int64))


# ---------------------------------------------------------------------------------------------
# Valuation


def covered(valuation: Valuation, frequency, timing=None) -> np.ndarray:
    """Which items (by payments a year, and timing codes where given) this module values
    under ``valuation``."""
    frequency = np.asarray(frequency)
    if valuation.curve.kind != "flat":
        return np.zeros(frequency.shape, dtype=bool)
    out = (valuation.approximation == "exact") | (frequency == 1)
    if timing is not None:
        out = out | (np.asarray(timing) == CONTINUOUS)
    return out


def _work(tables, cols: Columns, assumption: str) -> np.ndarray:
    """Work units: one an item under UDD (a few sums on shared columns); under the other
    assumptions the per-year pass sums every payment date, as the general path does
    (continuous items: see :func:`service.engine.continuous_columns.work`)."""
    if assumption == "udd":
        return np.ones(len(cols), dtype=np.int64)
    cont = cols.timing == CONTINUOUS
    if cont.any():
        from service.engine import continuous_columns

        out = np.zeros(len(cols), dtype=np.int64)
        out[cont] = continuous_columns.work(tables, cols.take(cont), assumption)
        out[~cont] = _work(tables, cols.take(~cont), assumption)
        return out
    m = cols.frequency
    ages = cols.age + cols.age_adjustment
    last = np.array([tb.last_age for tb in tables], dtype=float)[cols.table]
    horizon = last + 1.0 - ages
    by_life = np.maximum(np.floor(np.maximum(horizon - cols.deferral, -1.0) * m + _EPS) + 1, 0)
    count = np.minimum(by_life, np.rint(cols.term * m))
    return np.maximum(count, 1).astype(np.int64)


def value_columns(tables, columns, valuation: Valuation, *, max_work: int | None = None,
                  deadline: float | None = None) -> Values:
    """Return the present value of 1 p.a. of each item in ``columns`` (a :class:`Columns`,
    a :class:`~service.engine.joint_columns.JointColumns`, a mapping of arrays or a pandas
    DataFrame; a mapping or DataFrame with any of the two-life columns, ``age2``, ``both``,
    ``start_requires`` and the rest of ``joint_columns.JOINT_FIELDS``, is read as
    JointColumns), and its method code.

    Items this module does not cover under ``valuation`` (see :func:`covered`) are valued
    by the general path. Raises ItemError (paths like ``"3.lives.0.age"``, the general
    path's messages), WorkLimitError and DeadlineError like
    :func:`service.engine.annuity.value_annuities`.
    """
    from service.engine import joint_columns  # (it builds on this module)

    if joint_columns.is_joint(columns):
        return joint_columns.value_joint_columns(tables, columns, valuation,
                                                 max_work=max_work, deadline=deadline)
    cols = _as_columns(columns)
    rows = (list(zip(*(getattr(cols, name).tolist() for name in FIELDS), strict=True))
            if _small_covered(valuation, len(cols)) else ())
    exact = valuation.approximation == "exact"
    if rows and all(row[6] in (0, 1) and (exact or row[7] == 1) for row in rows):  # (timing
        # codes; frequencies Woolhouse leaves to exact sums)
        values = _value_small(tables, rows, [_row_item(cols, n) for n in range(len(cols))],
                              valuation, max_work, deadline, lambda: problems(
                                  tables, cols, valuation.fractional_age))
        return Values(np.array(values), np.full(len(cols), EXACT_SUM, dtype=np.int8),
                      methods(valuation))
    found = problems(tables, cols, valuation.fractional_age)
    if found:
        raise ItemError(found)
    fast = covered(valuation, cols.frequency, cols.timing)
    rest = np.flatnonzero(~fast)
    mine = cols if not rest.size else cols.take(fast)
    fast_work = int(_work(tables, mine, valuation.fractional_age).sum())
    values = np.zeros(len(cols))
    code = np.full(len(cols), EXACT_SUM, dtype=np.int8)
    if rest.size:
        got = _within(fast_work, max_work, lambda left: annuity.value_annuities(
            tables, cols.take(rest).to_items(), valuation, max_work=left, deadline=deadline,
            fast=False))
        values[rest] = got.value
        code[rest] = got.method_code
    elif max_work is not None and fast_work > max_work:
        raise WorkLimitError(fast_work, max_work)
    if not rest.size:
        values = _value(tables, cols, valuation, deadline)
    elif len(mine):
        values[fast] = _value(tables, mine, valuation, deadline)
    code[fast] = np.where(cols.timing[fast] == CONTINUOUS, INTEGRAL, EXACT_SUM)
    return Values(values, code, methods(valuation))


def _as_columns(columns) -> Columns:
    if isinstance(columns, Columns):
        return columns
    if isinstance(columns, Mapping):
        return Columns.from_dict(columns)
    if hasattr(columns, "columns") and hasattr(columns, "to_numpy"):
        return Columns.from_frame(columns)
    raise TypeError("columns must be Columns, a mapping of arrays or a pandas DataFrame")


def dispatch(tables, items, valuation: Valuation, *, max_work, deadline, measure,
             key_rates, listed: bool = False) -> Values | None:
    """Value ``items`` with the covered ones here and the others by the general path, or
    return None where nothing is covered (the caller then values them all itself).
    ``listed``: a few items valued in floats are given as lists (else as arrays; any other
    batch is given as arrays either way).

    Errors are the general path's: on any problem the whole batch is prepared by it, which
    raises the same ItemError as without this module.
    """
    if valuation.curve.kind != "flat" or len(items) == 0:
        return None
    if measure is not None and np.any(measure):
        return None  # sensitivities come from the general path's payments
    exact = valuation.approximation == "exact"
    if _small_covered(valuation, len(items)):
        rows = [_item_row(item) if _plain(item, exact) else None for item in items]
        if all(row is not None and row[6] != CONTINUOUS for row in rows):  # (discrete)
            values = _value_small(tables, rows, items, valuation, max_work, deadline,
                                  lambda: _found(tables, items, valuation))
            codes = [EXACT_SUM] * len(items)
            if listed:
                return Values(values, codes, methods(valuation))
            return Values(np.array(values), np.array(codes, dtype=np.int8), methods(valuation))
    from service.engine import joint_columns  # (it builds on this module)

    rows, which = [], []
    given = None
    if isinstance(items, ItemBatch):
        given = items
        others = sorted(items.others.items())
    else:
        others = enumerate(items)
    for n, item in others:
        if _plain(item, exact):
            rows.append(_item_row(item))
            which.append(n)
    if given is not None:
        held = covered(valuation, given.columns.frequency, given.columns.timing)
        take = given.rows[held]
        part = given.columns.take(held)
        if rows:
            places = np.concatenate([take, np.array(which, dtype=np.intp)])
            order = np.argsort(places, kind="stable")
            both = _from_rows(rows)
            cols = Columns(**{name: np.concatenate([getattr(part, name),
                                                    getattr(both, name)])[order]
                              for name in FIELDS})
            which = places[order].tolist()
        else:
            cols, which = part, take.tolist()
    if not which:  # two lives, perhaps
        return joint_columns.dispatch(tables, items, valuation, max_work=max_work,
                                      deadline=deadline)
    if given is None:
        cols = _from_rows(rows)
    if problems(tables, cols, valuation.fractional_age):
        _prepare(tables, items, valuation)  # raises the general path's ItemError
        return None  # (not reached unless the checks disagree: then the general path)
    which = np.array(which, dtype=np.intp)
    fast_work = int(_work(tables, cols, valuation.fractional_age).sum())
    size = len(items)
    values = np.zeros(size)
    code = np.full(size, EXACT_SUM, dtype=np.int8)
    rest = np.setdiff1d(np.arange(size), which)
    _value_rest(joint_columns.value_general, tables, items, rest, valuation, values, code,
                fast_work=fast_work, max_work=max_work, deadline=deadline)
    values[which] = _value(tables, cols, valuation, deadline)
    code[which] = np.where(cols.timing == CONTINUOUS, INTEGRAL, EXACT_SUM)
    return Values(values, code, methods(valuation))


def _within(done: int, max_work: int | None, value):
    """``value(left)``, ``left`` what ``max_work`` leaves after ``done`` work units (None for
    no bound); a WorkLimitError it raises counts ``done`` too."""
    left = None if max_work is None else max_work - done
    try:
        return value(left)
    except WorkLimitError as exc:
        raise WorkLimitError(exc.work + done, max_work) from None


def _value_rest(general, tables, items, rest, valuation: Valuation, values, code, *,
                fast_work: int, max_work, deadline) -> None:
    """Value ``items[rest]`` by ``general`` (a value_annuities-like call) into ``values`` and
    ``code``, within what the fast items' ``fast_work`` leaves of ``max_work``; an ItemError
    is raised as the general path places it in the whole batch."""
    if not rest.size:
        if max_work is not None and fast_work > max_work:
            raise WorkLimitError(fast_work, max_work)
        return
    try:
        got = _within(fast_work, max_work, lambda left: general(
            tables, [items[n] for n in rest.tolist()], valuation, max_work=left,
            deadline=deadline))
    except ItemError:
        _prepare(tables, items, valuation)  # the same problems, placed in the batch
        raise
    values[rest] = got.value
    code[rest] = got.method_code


def _plain(item, exact: bool) -> bool:
    """Whether ``item`` is a single-life item this module values (one the general path
    would accept as such: whole frequency (discrete payments) and duration, a table index,
    known start requirement, survivorship amounts in [0, 1])."""
    p = item.payments
    return (p.timing in TIMING_CODES and len(item.lives) == 1
            and (p.timing == "continuous"
                 or (type(p.frequency) is int and (exact or p.frequency == 1)))
            and (item.lives[0].duration is None or type(item.lives[0].duration) is int)
            and type(item.lives[0].table) is int
            and item.start_requires in START_REQUIREMENTS
            and (item.survivorship == LAST_SURVIVOR  # (the usual amounts: no loop)
                 or all(math.isfinite(a) and 0 <= a <= 1 for a in item.survivorship)))


def _small_covered(valuation: Valuation, size: int) -> bool:
    """Whether a batch of ``size`` covered items goes to :mod:`service.engine.small`."""
    return (0 < size <= small.SMALL_BATCH and valuation.fractional_age == "udd"
            and valuation.curve.kind == "flat")


def _found(tables, items, valuation: Valuation) -> dict:
    """The general path's problems with ``items`` (empty when there is none)."""
    try:
        _prepare(tables, items, valuation)
    except ItemError as error:
        return error.errors
    return {}


def _value_small(tables, rows, items, valuation: Valuation, max_work, deadline,
                 find) -> list[float]:
    """Value a few covered rows in plain floats, after the checks the column path makes:
    each item's own (``_check_item``), then its table index, then its life under its table
    (where a row is suspect, ``find()`` words the problems, as the path it stands in for)."""
    errors = _check_items(items)
    if errors:
        raise ItemError(errors)
    bad = [n for n, row in enumerate(rows) if not 0 <= row[0] < len(tables)]
    if bad:
        raise ItemError({f"{n}.lives.0.sex": ["no table for this life in the basis"]
                         for n in bad})
    if any(small.suspect(tables, row) for row in rows):
        found = find()
        if found:
            raise ItemError(found)
    if max_work is not None and len(rows) > max_work:
        raise WorkLimitError(len(rows), max_work)  # one unit an item under UDD (_work)
    _on_time(deadline)
    return small.value_rows(tables, rows, valuation.curve.constant_force)


@lru_cache(maxsize=64)
def _slot_tables(ms: tuple, delta: float):
    """For each frequency m: P0[k] = sum_(i<k) x^i and P1[k] = sum_(i<k) i x^i, x = e^(-delta/m),
    k = 0..m, concatenated; return (offset by m, P0, P1)."""
    offset = {}
    p0, p1 = [], []
    at = 0
    for m in ms:
        i = np.arange(m, dtype=float)
        x = np.exp(-delta * i / m)
        p0.append(np.concatenate([[0.0], np.cumsum(x)]))
        p1.append(np.concatenate([[0.0], np.cumsum(i * x)]))
        offset[m] = at
        at += m + 1
    return offset, np.concatenate(p0), np.concatenate(p1)


def _value(tables, cols: Columns, valuation: Valuation, deadline) -> np.ndarray:
    """Values of validated, covered items (flat rate; exact sums, or continuous)."""
    n = len(cols)
    values = np.zeros(n)
    if not n:
        return values
    cont = cols.timing == CONTINUOUS
    if cont.any():
        from service.engine import continuous_columns

        values[cont] = continuous_columns.value(tables, cols.take(cont), valuation,
                                                deadline)
        if not cont.all():
            values[~cont] = _value(tables, cols.take(~cont), valuation, deadline)
        return values
    ages = cols.age + cols.age_adjustment
    anchor = np.floor(ages + _SNAP).astype(np.int64)
    dkey = _select_key(tables, cols.table, cols.duration)
    growth = np.log1p(cols.escalation)
    m_all = cols.frequency.astype(np.int64)
    delta = valuation.curve.constant_force
    ms = tuple(np.unique(m_all).tolist())
    slots = _slot_tables(ms, delta)
    done = None
    if valuation.fractional_age == "udd":
        from service.engine import commutation  # (it builds on this module)

        values, done = commutation.value(tables, cols, ages, anchor, dkey, growth, m_all,
                                         delta, slots, deadline)
        if done.all():
            return values
    order = np.lexsort((growth, anchor, cols.flat_extra, cols.mortality_multiplier, dkey,
                        cols.table))
    if done is not None:
        order = order[~done[order]]  # the rest on chains of their own
        n = order.size
    for start in range(0, n, _CHUNK_ITEMS):
        _on_time(deadline)
        idx = order[start:start + _CHUNK_ITEMS]
        values[idx] = _value_chunk(tables, cols, idx, ages[idx], anchor[idx], dkey[idx],
                                   growth[idx], m_all[idx], delta, valuation.fractional_age,
                                   slots)
    return values


def _sorted_chains(keys) -> tuple[np.ndarray, np.ndarray]:
    """Items sorted by ``keys`` (arrays) share a chain with their neighbours of the same key:
    return each item's chain and the first item of each chain."""
    new = np.zeros(keys[0].size, dtype=bool)
    new[0] = True
    for key in keys:
        new[1:] |= key[1:] != key[:-1]
    return np.cumsum(new) - 1, np.flatnonzero(new)


def _chain_rates(tables, t, anchor, dkey, mult, extra) -> tuple[np.ndarray, np.ndarray]:
    """The chains of lives (one per entry of the arrays) as far as any can live: q of each
    year from the integer age ``anchor`` (q = 1 from the table's last age; (chains, width))
    and survival C_0 = 1 .. C_width ((chains, width + 1))."""
    last = np.array([tb.last_age for tb in tables])
    width = int((last[t] - anchor).max()) + 3
    q = _year_rates(tables, t[:, None], anchor[:, None], dkey[:, None], mult[:, None],
                    extra[:, None], np.arange(width)[None, :])
    cum = np.ones((t.size, width + 1))
    cum[:, 1:] = np.cumprod(1.0 - q, axis=1)
    return q, cum


def _value_chunk(tables, cols, idx, ages, anchor, dkey, growth, m, delta, assumption, slots):
    t = cols.table[idx]
    mult = cols.mortality_multiplier[idx]
    extra = cols.flat_extra[idx]
    size = idx.size
    chain, rep = _sorted_chains((t, dkey, mult, extra, anchor, growth))
    q, cum = _chain_rates(tables, t[rep], anchor[rep], dkey[rep], mult[rep], extra[rep])
    width = q.shape[1]
    last = np.array([tb.last_age for tb in tables])
    start = fraction_survival(q[chain, 0], np.maximum(ages - anchor, 0.0), assumption)
    win = _windows(cols, idx, ages, anchor, growth, m, delta, last[t])
    frac, u, mf, arr, big, phi_, guaranteed, n0 = (
        win.frac, win.u, win.mf, win.arr, win.big, win.phi, win.guaranteed, win.n0)
    kappa, rho, lw = win.kappa, win.rho, win.lw

    values = np.zeros(size)
    # The guarantee: P(alive at u) v^u sum over its years, in closed form.
    if (guaranteed > 0).any():
        alive = _alive_at(q, cum, chain, frac + u, start, assumption)
        values += _guarantee(win, m, growth, delta, alive)

    live = win.live
    if not live.any():
        return values
    ka, ia, ib = win.ka, win.ia, win.ib
    kb = np.where(live, np.minimum(win.kb, width - 1), 0)
    ctx = _Slots.of(m, mf, win.dm, rho, kappa, phi_, slots, delta)
    life = np.zeros(size)
    if assumption == "udd":
        cum2 = np.concatenate([cum, np.zeros((rep.size, 1))], axis=1)  # C up to width + 1
        one = np.zeros(size, dtype=np.int64)
        hi_first = np.where(kb == ka, ib + 1, m)
        a1, b1 = ctx.weights(ia, hi_first)
        life += np.exp(ka * lw) * (a1 * cum2[chain, ka] + b1 * cum2[chain, ka + 1])
        two = live & (kb > ka)
        a2, b2 = ctx.weights(one, ib + 1)
        life += np.where(two, np.exp(kb * lw) * (a2 * cum2[chain, kb] + b2 * cum2[chain, kb + 1]),
                         0.0)
        mid = live & (kb > ka + 1)
        if mid.any():
            af, bf = ctx.weights(one, m)
            life += _whole_years(cum2, chain, lw, growth, delta, rep, ka, kb, af, bf, mid)
    else:
        life = _per_year(q, cum, chain, lw, ka, kb, ia, ib, ctx, assumption, live,
                         (frac, u, n0 - arr, big))
    values += np.where(live, life / (mf * start), 0.0)
    return values


@dataclass(frozen=True, eq=False)
class _Windows:
    """Each item's payments as periods and slots (see the module docstring): the fraction
    f of its age, its deferral u, m as a float, 1 in arrears, G = floor(f m) and phi (snapped
    as the general path's ages), the guaranteed payments, the periods evaluated (count; the
    life-contingent ones from ``first``), n0 = U + arr, D = m dq + dm, kappa, rho =
    1 / (1 + r), ln w; the first and last life-contingent payments as (year of age, slot)."""

    frac: np.ndarray
    u: np.ndarray
    mf: np.ndarray
    arr: np.ndarray
    big: np.ndarray
    phi: np.ndarray
    guaranteed: np.ndarray
    count: np.ndarray
    first: np.ndarray
    n0: np.ndarray
    dm: np.ndarray
    kappa: np.ndarray
    rho: np.ndarray
    lw: np.ndarray
    live: np.ndarray
    ka: np.ndarray  # 0 where not live
    ia: np.ndarray
    kb: np.ndarray  # 0 where not live; not clipped to the chain
    ib: np.ndarray


def _windows(cols, idx, ages, anchor, growth, m, delta, last) -> _Windows:
    """The payment windows of items ``idx`` (as batch._payment_count and
    discrete._discrete_values count them); ``last`` is each item's table's last age."""
    frac = np.maximum(ages - anchor, 0.0)
    u = cols.deferral[idx]
    mf = m.astype(float)
    arr = (cols.timing[idx] == 1).astype(np.int64)
    horizon = last + 1.0 - (anchor + frac)
    by_life = np.maximum(np.floor(np.maximum(horizon - u, -1.0) * mf + _EPS) + 1, 0)
    guaranteed = np.rint(cols.guarantee[idx] * mf).astype(np.int64)
    count = np.minimum(np.maximum(by_life, guaranteed),
                       np.rint(cols.term[idx] * mf)).astype(np.int64)
    first = np.minimum(guaranteed, count)
    n0 = np.rint(u * mf).astype(np.int64) + arr
    # Slots: G = floor(f m), phi = f m - G (snapped as the general path's ages).
    fm = frac * mf
    big = np.floor(fm).astype(np.int64)
    phi_ = fm - big
    snap = phi_ >= 1.0 - mf * _SNAP
    big = np.where(snap, big + 1, big)
    phi_ = np.where(snap, phi_ - 1.0, phi_)
    dq, dm = np.divmod(big + n0, m)
    live = count > first
    ka, ia = np.divmod(n0 + first + big, m)
    kb, ib = np.divmod(n0 + count - 1 + big, m)
    return _Windows(frac, u, mf, arr, big, phi_, guaranteed, count, first, n0, dm,
                    np.exp(delta * big / mf - dq * growth), np.exp(-growth), growth - delta,
                    live, np.where(live, ka, 0), ia, np.where(live, kb, 0), ib)


def _alive_at(q, cum, chain, position, start, assumption):
    """The probability that each life, alive at the fraction of its first year where its
    chain starts (``start``: survival to it from the integer age), is alive at ``position``
    years past its integer age (the deferral's end: f + u), from its chain's q and C."""
    width = q.shape[1]
    k = np.floor(position + _SNAP)
    r = between(position - k, 0.0, 1.0)
    k = between(k, 0, width).astype(np.intp)
    return cum[chain, k] * fraction_survival(q[chain, np.minimum(k, width - 1)], r,
                                             assumption) / start


def _guarantee(win: _Windows, m, growth, delta, alive):
    """The guaranteed payments' value given P(alive at u) ``alive``: v^u times the
    annuity-certain of each whole year, the years summed as a geometric series in closed
    form, and of the part year."""
    out = np.zeros(win.guaranteed.size)
    g = np.flatnonzero(win.guaranteed > 0)
    whole, part = np.divmod(win.guaranteed[g], m[g])
    lam = delta - growth[g]
    advance = win.arr[g] == 0
    mf = win.mf[g]
    # a-due^(m) of n years is n phi(n delta) / phi(delta / m) (interest.annuity_certain),
    # in arrears v^(1/m) times it; the whole years' sum is a geometric series.
    step = np.where(advance, 1.0, np.exp(-delta / mf)) / phi(0, delta / mf)
    years = whole * phi(0, whole * lam) / phi(0, lam) * (phi(0, delta) * step)
    tail = np.exp(-lam * whole) * (part / mf) * phi(0, part / mf * delta) * step
    out[g] = alive[g] * np.exp(-delta * win.u[g]) * (years + tail)
    return out


@dataclass(frozen=True, eq=False)
class _Slots:
    """Per-item slot data: sums of c_i (1 - s_i) and c_i s_i over slot ranges. Made by
    :meth:`of`, which works out once what every range needs."""

    m: np.ndarray
    mf: np.ndarray
    dm: np.ndarray
    rho: np.ndarray
    kappa: np.ndarray
    phi: np.ndarray
    tables: tuple
    delta: float
    base: np.ndarray  # each item's offset of its frequency in the slot tables
    snapped: bool  # whether any phi < 0 (an age snapped up: its first slot clipped)

    @classmethod
    def of(cls, m, mf, dm, rho, kappa, phi, tables, delta) -> "_Slots":
        return cls(m, mf, dm, rho, kappa, phi, tables, delta, _offsets(m, tables[0]),
                   bool((phi < 0).any()))

    def weights(self, lo, hi):
        """(A, B): sums of c_i (1 - s_i) and c_i s_i for slots lo <= i < hi."""
        _, p0, p1 = self.tables
        base, dm = self.base, self.dm
        lo_ = np.minimum(lo, hi)
        lo_in, hi_in = base + np.minimum(lo_, dm), base + np.minimum(hi, dm)
        lo_out, hi_out = base + np.maximum(lo_, dm), base + np.maximum(hi, dm)
        s0 = self.rho * (p0[hi_in] - p0[lo_in]) + (p0[hi_out] - p0[lo_out])
        s1 = self.rho * (p1[hi_in] - p1[lo_in]) + (p1[hi_out] - p1[lo_out])
        b = self.kappa * (self.phi * s0 + s1) / self.mf
        a = self.kappa * ((self.mf - self.phi) * s0 - s1) / self.mf
        # The first slot's fraction is clipped to 0 where phi < 0 (an age snapped up).
        if self.snapped and (clipped := (lo_ == 0) & (hi > 0) & (self.phi < 0)).any():
            c0 = self.kappa * np.where(self.dm > 0, self.rho, 1.0)
            shift = np.where(clipped, c0 * (-self.phi / self.mf), 0.0)
            a, b = a - shift, b + shift
        # Where the slots fall at the very end of the year (1 - s_i tiny: a life with a year
        # of q = 1 and little of it left), A is a small difference of the prefix sums: sum
        # its few slots directly instead (at most a couple: 1 - s_i < 1e-3 for every slot).
        ill = a < _ILL * (a + b)
        if ill.any():
            w = np.flatnonzero(ill)
            a = a.copy()
            a[w] = _direct_a(lo_[w], hi[w], self.m[w], self.mf[w], self.dm[w], self.rho[w],
                             self.kappa[w], self.phi[w], self.delta)
        return a, b


def _direct_a(lo, hi, m, mf, dm, rho, kappa, phi, delta):
    """sum c_i (1 - s_i) over the slots lo <= i < hi, slot by slot."""
    out = np.zeros(lo.size)
    for step in range(int((hi - lo).max(initial=0))):
        i = lo + step
        term = (kappa * np.where(i < dm, rho, 1.0) * np.exp(-delta * i / mf)
                * np.where(phi + i < 0, 1.0, ((m - i) - phi) / mf))
        out += np.where(i < hi, term, 0.0)
    return out


def _offsets(m, offset):
    lookup = np.zeros(int(m.max()) + 1, dtype=np.int64)
    for key, at in offset.items():
        if key < lookup.size:
            lookup[key] = at
    return lookup[m]


def _whole_years(cum2, chain, lw, growth, delta, rep, ka, kb, af, bf, mid):
    """A_full M0 + B_full M1 over the whole years ka < K < kb of each item ``mid``, from
    cumulative columns of its chain (or directly where the difference would cancel)."""
    cols = cum2.shape[1]  # C_0 .. C_(width+1)
    kk = np.arange(cols - 1)
    w = np.exp(kk[None, :] * lw[rep][:, None])
    x = w * cum2[:, :-1]
    y = w * cum2[:, 1:]
    zero = np.zeros((rep.size, 1))
    px = np.concatenate([zero, np.cumsum(x, axis=1)], axis=1)
    py = np.concatenate([zero, np.cumsum(y, axis=1)], axis=1)
    sx = np.concatenate([np.cumsum(x[:, ::-1], axis=1)[:, ::-1], zero], axis=1)
    sy = np.concatenate([np.cumsum(y[:, ::-1], axis=1)[:, ::-1], zero], axis=1)
    lo = np.where(mid, ka + 1, 0)
    hi = np.where(mid, kb, 0)
    c = chain
    by_prefix = (px[c, lo] * af + py[c, lo] * bf) <= (sx[c, hi] * af + sy[c, hi] * bf)
    m0 = np.where(by_prefix, px[c, hi] - px[c, lo], sx[c, lo] - sx[c, hi])
    m1 = np.where(by_prefix, py[c, hi] - py[c, lo], sy[c, lo] - sy[c, hi])
    value = af * m0 + bf * m1
    taken = np.where(by_prefix, px[c, lo] * af + py[c, lo] * bf, sx[c, hi] * af + sy[c, hi] * bf)
    bad = mid & (taken > _CANCELLATION * value)
    if bad.any():
        which = np.flatnonzero(bad)
        direct = np.zeros(which.size)
        for part in _pair_chunks(hi[which] - lo[which]):
            sel = which[part]
            own, k = _expand(np.arange(sel.size), lo[sel], hi[sel])
            item = sel[own]
            term = np.exp(k * lw[item]) * (af[item] * cum2[c[item], k]
                                           + bf[item] * cum2[c[item], k + 1])
            direct[part] = np.bincount(own, weights=term, minlength=sel.size)
        value[which] = direct
    return np.where(mid, value, 0.0)




def _pair_chunks(cost):
    """Yield index arrays of consecutive entries whose summed cost stays near _CHUNK_PAIRS."""
    total = np.cumsum(cost)
    start = 0
    while start < cost.size:
        base = total[start - 1] if start else 0
        stop = int(np.searchsorted(total, base + _CHUNK_PAIRS, side="right"))
        stop = max(stop, start + 1)
        yield np.arange(start, stop)
        start = stop


def _per_year(q, cum, chain, lw, ka, kb, ia, ib, ctx: _Slots, assumption, live, pay):
    """Life-contingent values summed slot by slot within each year of age (any assumption),
    vectorised over the (item, year) pairs and looping over the slots of each frequency.

    Each payment's age is found as the general path finds it (f + t, t = u + (j + arr)/m,
    the same floating-point steps): under a constant force or Balducci's assumption a year
    with q = 1 keeps the life only at its very start, so rounding decides a payment there.
    """
    frac, u, n0, big = pay
    size = chain.size
    out = np.zeros(size)
    width = q.shape[1]
    for m in np.unique(ctx.m[live]).tolist():
        group = np.flatnonzero(live & (ctx.m == m))
        for part in _pair_chunks((kb[group] - ka[group] + 1) * max(1, m // 4)):
            sel = group[part]
            own, k = _expand(sel, ka[sel], kb[sel] + 1)
            lo = np.where(k == ka[own], ia[own], 0)
            hi = np.where(k == kb[own], ib[own] + 1, m)
            ch = chain[own]
            base = ctx.kappa[own]
            dm, rho = ctx.dm[own], ctx.rho[own]
            f_, u_ = frac[own], u[own]
            j0 = k * m - big[own] - n0[own]  # j + arr of slot 0 of year k (n0 here: U)
            acc = np.zeros(own.size)
            for i in range(m):
                active = (i >= lo) & (i < hi)
                if not active.any():
                    continue
                s = f_ + (u_ + (j0 + i) / m)
                kk = np.floor(s + _SNAP)
                r = between(s - kk, 0.0, 1.0)
                kk = between(kk, 0, width).astype(np.intp)
                surv = cum[ch, kk] * fraction_survival(q[ch, np.minimum(kk, width - 1)], r,
                                                       assumption)
                c = base * math.exp(-ctx.delta * i / m) * np.where(i < dm, rho, 1.0)
                acc += np.where(active, c * surv, 0.0)
            out += np.bincount(own, weights=np.exp(k * lw[own]) * acc, minlength=size)
    return out
