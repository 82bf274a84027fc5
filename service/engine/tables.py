"""Mortality tables: annual rates q by integer age, optionally with a select period.

A table runs from ``first_age`` to ``last_age`` and closes with q(last_age) = 1. A select
table adds ``select_q[j, s]``: the rate in the (s+1)-th year after selection for a life
selected at age ``select_first_age + j``; from duration ``select_period`` on the life follows
the ultimate rates.
"""

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from service.engine.errors import TableError

#: Laws are tabulated up to this age, where q is set to 1.
LAW_LAST_AGE = 130


def _frozen(a) -> np.ndarray:
    arr = np.array(a, dtype=float)
    arr.setflags(write=False)
    return arr


def _is_frozen_floats(a) -> bool:
    return isinstance(a, np.ndarray) and a.dtype == np.float64 and not a.flags.writeable


@dataclass(frozen=True, eq=False)
class MortalityTable:
    """Annual mortality rates, ultimate and (optionally) select.

    Build it with :meth:`of`, which takes any sequences of rates; the constructor itself
    takes read-only float arrays (as :meth:`of` makes them) and only validates.
    """

    first_age: int
    q: np.ndarray
    select_first_age: int = 0
    select_q: np.ndarray = field(default_factory=lambda: _frozen(np.empty((0, 0))))
    #: Makeham parameters (A, B, c) where the ultimate rates were tabulated from that law
    #: (Gompertz: A = 0); the law then also gives the force of mortality at any age.
    law: tuple[float, float, float] | None = None

    @classmethod
    def of(cls, first_age: int, q, select_first_age: int = 0, select_q=None, *,
           law: tuple[float, float, float] | None = None) -> "MortalityTable":
        """Build a table from sequences of rates (copied into read-only float arrays)."""
        select = np.array(np.empty((0, 0)) if select_q is None else select_q, dtype=float)
        if select.ndim != 2:
            select = select.reshape(0, 0)
        return cls(first_age, _frozen(q), select_first_age, _frozen(select), law=law)

    def __post_init__(self):
        if not (_is_frozen_floats(self.q) and _is_frozen_floats(self.select_q)
                and self.q.ndim == 1 and self.select_q.ndim == 2):
            raise TypeError("the rates of a MortalityTable are read-only float arrays: build "
                            "it with MortalityTable.of")
        _check_rates(self.q, self.first_age, "q")
        if self.q[-1] != 1.0:
            raise TableError(f"the table must close with q = 1 at its last age {self.last_age}")
        if self.select_period:
            _check_rates(self.select_q, self.select_first_age, "select q")
            if self.select_first_age < self.first_age:
                raise TableError("select ages start before the ultimate table")
            if self.select_first_age + self.select_q.shape[0] - 1 > self.last_age:
                raise TableError("select ages run past the ultimate table")

    @property
    def last_age(self) -> int:
        return self.first_age + len(self.q) - 1

    @property
    def select_period(self) -> int:
        return int(self.select_q.shape[1]) if self.select_q.size else 0

    @property
    def select_last_age(self) -> int:
        return self.select_first_age + self.select_q.shape[0] - 1


def _check_rates(q: np.ndarray, first_age: int, what: str) -> None:
    bad = ~np.isfinite(q) | (q < 0) | (q > 1)
    if bad.any():
        row = int(np.argwhere(bad)[0][0])
        raise TableError(f"{what} at age {first_age + row} is {q.flat[np.flatnonzero(bad)[0]]!r}, "
                         "outside [0, 1]")


def makeham_q(ages, a: float, b: float, c: float) -> np.ndarray:
    """Return annual q under Makeham's law mu(x) = A + B c^x.

    Notes
    -----
    p(x) = exp(-A - B c^x (c - 1) / ln c); Gompertz is the case A = 0.
    """
    ages = np.asarray(ages, dtype=float)
    if not (b > 0 and c > 1 and np.isfinite([a, b, c]).all()):
        raise TableError("Makeham's law needs B > 0 and c > 1")
    if a < 0 and not (a + b * c ** ages.min() > 0):
        raise TableError("Makeham's law gives a negative force of mortality at the first age")
    return -np.expm1(-a - b * c**ages * (c - 1.0) / np.log(c))


def table_from_law(law: str, params: dict, first_age: int, *, last_age: int = LAW_LAST_AGE,
                   select_factors=()) -> MortalityTable:
    """Tabulate a named law as annual q from ``first_age`` to ``last_age`` (q = 1 there).

    ``select_factors[s]`` multiplies the ultimate rate q(x + s) in the (s+1)-th select year.
    """
    ages = np.arange(first_age, last_age + 1)
    if law == "makeham":
        q = makeham_q(ages, params["A"], params["B"], params["c"])
    elif law == "gompertz":
        q = makeham_q(ages, 0.0, params["B"], params["c"])
    else:
        raise TableError(f"unknown law {law!r}; known: makeham, gompertz")
    q[-1] = 1.0
    a = 0.0 if law == "gompertz" else float(params["A"])
    table = MortalityTable.of(first_age, q, law=(a, float(params["B"]), float(params["c"])))
    return with_select_factors(table, select_factors)


def with_select_factors(table: MortalityTable, factors) -> MortalityTable:
    """Return ``table`` with select rates q[x]+s = factors[s] q(x + s)."""
    factors = np.asarray(factors, dtype=float)
    if factors.size == 0:
        return table
    if not (np.isfinite(factors).all() and (factors >= 0).all()):
        raise TableError("select factors must be finite and non-negative")
    period = factors.size
    # Every age can be a selection age; beyond the last age the rate stays 1.
    idx = np.arange(len(table.q))[:, None] + np.arange(period)[None, :]
    ultimate = np.where(idx < len(table.q), table.q[np.minimum(idx, len(table.q) - 1)], 1.0)
    select_q = np.where(idx < len(table.q) - 1, np.minimum(ultimate * factors[None, :], 1.0), 1.0)
    return MortalityTable.of(table.first_age, table.q, table.first_age, select_q, law=table.law)


#: What ``blend_tables`` can blend: the rates themselves, or the survivor functions.
BLEND_METHODS = ("q", "survival")


def blend_tables(tables: Sequence[MortalityTable], weights: Sequence[float],
                 on: str) -> MortalityTable:
    """Return the weighted blend of ``tables`` (for example of male and female rates).

    ``on="q"``: q(a) = sum_i w_i q_i(a); select rates are blended elementwise when every
    table has the same select structure (first selection age and shape), and a blend of
    tables none of which is select has ultimate rates only.
    ``on="survival"``: from a common radix at the first age, l(a) = sum_i w_i l_i(a) with
    l_i(a) = prod_{b<a} (1 - q_i(b)), and q(a) = 1 - l(a+1) / l(a), that is
    sum_i w_i l_i(a) q_i(a) / l(a); q = 1 where l(a) = 0 and at the last age. Select tables
    are refused.

    The tables must share their first and last ages; the weights must be finite,
    non-negative and sum to 1 within 1e-12. Rates are capped at 1. The result has no law.
    Raises TableError otherwise, ValueError for an unknown method.
    """
    if on not in BLEND_METHODS:
        raise ValueError(f"unknown blend method {on!r}; known: {', '.join(BLEND_METHODS)}")
    tables = list(tables)
    try:
        w = np.array(weights, dtype=float)
    except (TypeError, ValueError):
        raise TableError("blend weights must be numbers") from None
    if not tables:
        raise TableError("a blend needs at least one table")
    if w.shape != (len(tables),):
        raise TableError(f"{w.size} weights for {len(tables)} tables")
    if not (np.isfinite(w).all() and (w >= 0).all()):
        raise TableError("blend weights must be finite and non-negative")
    if abs(w.sum() - 1.0) > 1e-12:
        raise TableError(f"blend weights must sum to 1, they sum to {w.sum()!r}")
    first, last = tables[0].first_age, tables[0].last_age
    if any(t.first_age != first or t.last_age != last for t in tables):
        raise TableError("blended tables must share their first and last ages; got "
                         + ", ".join(f"{t.first_age}-{t.last_age}" for t in tables))
    q = np.stack([t.q for t in tables])
    select = [t.select_period > 0 for t in tables]
    if on == "survival":
        if any(select):
            raise TableError("select tables cannot be blended on survival; blend on q")
        # l_i(a) for a = first .. last, from a radix of 1 at the first age.
        lives = np.cumprod(np.hstack([np.ones((len(tables), 1)), 1.0 - q[:, :-1]]), axis=1)
        alive = w @ lives
        dying = w @ (lives * q)
        blended = np.ones(alive.size)
        positive = alive > 0
        blended[positive] = dying[positive] / alive[positive]
        blended = np.clip(blended, 0.0, 1.0)
        blended[-1] = 1.0
        return MortalityTable.of(first, blended)
    # Where every table has q = 1 the blend keeps exactly 1 (weights sum to 1 only within 1e-12).
    blended = np.where((q == 1.0).all(axis=0), 1.0, np.minimum(w @ q, 1.0))
    blended[-1] = 1.0
    if not any(select):
        return MortalityTable.of(first, blended)
    shape, start = tables[0].select_q.shape, tables[0].select_first_age
    if not all(select) or any(t.select_q.shape != shape or t.select_first_age != start
                              for t in tables):
        raise TableError("select rates can only be blended between tables with the same "
                         "select structure (first selection age, ages and select period)")
    stacked = np.stack([t.select_q for t in tables])
    select_q = np.where((stacked == 1.0).all(axis=0), 1.0,
                        np.minimum(np.tensordot(w, stacked, axes=1), 1.0))
    return MortalityTable.of(first, blended, start, select_q)
