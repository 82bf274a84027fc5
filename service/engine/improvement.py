"""Mortality improvement scales and projected tables.

A scale gives the annual improvement rate r(a, y) at integer age a in calendar year y. The
base table's rates are those of calendar year ``base_year``; the rate at age a in year y is
q(a) F(a, y) with the cumulative factor

    F(a, y) = prod_{t=base_year}^{y-1} (1 - r(a, t))          for y >= base_year,
    F(a, y) = 1 / prod_{t=y}^{base_year-1} (1 - r(a, t))      for y <  base_year.

A scale is either one-dimensional (one rate per age, optionally replaced by
``long_term_rate`` from calendar year ``long_term_from`` on) or two-dimensional (a rate per
age and calendar year in ``years``; years before the first column use the first column, years
after the last column use ``long_term_rate``).

The factors are tabulated once per scale over the calendar years
``base_year - YEARS_BEFORE .. base_year + YEARS_AFTER``; asking for a year outside that window
raises ValueError.
"""

from dataclasses import dataclass, field

import numpy as np

from service.engine.errors import TableError
from service.engine.tables import MortalityTable

#: The factor window: this many calendar years before and after the base year.
YEARS_BEFORE = 200
YEARS_AFTER = 300


def _integers(values, what: str) -> np.ndarray:
    arr = np.asarray(values)
    if arr.dtype.kind in "iu":
        return arr.astype(np.int64)
    if arr.dtype.kind == "f" and np.isfinite(arr).all() and (arr == np.round(arr)).all():
        return arr.astype(np.int64)
    raise ValueError(f"{what} must be integers")


def _frozen(arr: np.ndarray) -> np.ndarray:
    arr = np.array(arr)
    arr.setflags(write=False)
    return arr


def _consecutive(values, what: str) -> np.ndarray:
    arr = np.asarray(values)
    if arr.ndim != 1 or arr.size == 0:
        raise TableError(f"{what} must be a non-empty one-dimensional list")
    try:
        ints = _integers(arr, what)
    except ValueError as exc:
        raise TableError(str(exc)) from None
    if (np.diff(ints) != 1).any():
        raise TableError(f"{what} must be consecutive integers in increasing order")
    return ints


@dataclass(frozen=True, eq=False)
class Scale:
    """An improvement scale by age (1-D) or by age and calendar year (2-D).

    Build it with :meth:`of`, which validates the rates and tabulates the factors; the
    constructor takes the finished read-only arrays (as :meth:`of` makes them).
    """

    ages: np.ndarray
    rates: np.ndarray
    base_year: int
    years: np.ndarray | None = None
    long_term_rate: float = 0.0
    long_term_from: int | None = None
    #: F(a, y) for every scale age and every year of the factor window.
    factors: np.ndarray = field(default=None, repr=False)

    @classmethod
    def of(cls, ages, rates, base_year: int, years=None, long_term_rate: float = 0.0,
           long_term_from: int | None = None) -> "Scale":
        """Validate a scale given as sequences and build it with its factors tabulated."""
        ages = _consecutive(ages, "scale ages")
        try:
            rates = np.array(rates, dtype=float)
        except (TypeError, ValueError):
            raise TableError("improvement rates must be numbers") from None
        if not isinstance(base_year, (int, np.integer)) or isinstance(base_year, bool):
            raise TableError("base_year must be an integer calendar year")
        long_term_rate = float(long_term_rate)
        if rates.ndim == 1:
            if years is not None:
                raise TableError("years are only for a scale by age and year (2-D rates)")
            if rates.shape != ages.shape:
                raise TableError(f"{rates.size} rates for {ages.size} ages")
            years_axis = None
            if long_term_from is not None and (
                    not isinstance(long_term_from, (int, np.integer))
                    or isinstance(long_term_from, bool)):
                raise TableError("long_term_from must be an integer calendar year")
        elif rates.ndim == 2:
            if long_term_from is not None:
                raise TableError("long_term_from is only for a scale by age (1-D rates); "
                                 "a 2-D scale uses long_term_rate after its last year")
            if years is None:
                raise TableError("a scale by age and year needs the calendar years of its columns")
            years_axis = _consecutive(years, "scale years")
            if rates.shape != (ages.size, years_axis.size):
                raise TableError(f"rates have shape {rates.shape}, expected "
                                 f"({ages.size}, {years_axis.size}) for the ages and years given")
        else:
            raise TableError("improvement rates must be 1-D (by age) or 2-D (by age and year)")
        for value, what in ((rates, "improvement rates"), (np.array(long_term_rate),
                                                          "the long-term rate")):
            if not np.isfinite(value).all():
                raise TableError(f"{what} must be finite")
            if (value >= 1).any():
                raise TableError(f"{what} must be below 1 (1 - r must stay positive)")
        ages, rates = _frozen(ages), _frozen(rates)
        base_year = int(base_year)
        years_axis = None if years_axis is None else _frozen(years_axis)
        if long_term_from is not None:
            long_term_from = int(long_term_from)
        factors = _tabulate(ages, rates, base_year, years_axis, long_term_rate, long_term_from)
        return cls(ages, rates, base_year, years_axis, long_term_rate, long_term_from,
                   _frozen(factors))

    def __post_init__(self):
        window = (self.ages.size, YEARS_BEFORE + YEARS_AFTER + 1)
        arrays = [self.ages, self.rates, self.factors] + (
            [] if self.years is None else [self.years])
        if not (all(isinstance(a, np.ndarray) and not a.flags.writeable for a in arrays)
                and type(self.base_year) is int and self.factors.shape == window):
            raise TypeError("a Scale holds read-only arrays and its tabulated factors: build "
                            "it with Scale.of")

    @property
    def first_year(self) -> int:
        """The first calendar year of the factor window."""
        return self.base_year - YEARS_BEFORE

    @property
    def last_year(self) -> int:
        """The last calendar year of the factor window."""
        return self.base_year + YEARS_AFTER

    def covers(self, first_age: int, last_age: int) -> bool:
        return int(self.ages[0]) <= first_age and last_age <= int(self.ages[-1])

    def _age_index(self, ages) -> np.ndarray:
        ages = _integers(ages, "ages")
        if ages.size and (ages.min() < self.ages[0] or ages.max() > self.ages[-1]):
            raise ValueError(f"the scale covers ages {self.ages[0]} to {self.ages[-1]} only")
        return ages - self.ages[0]

    def rate(self, ages, years) -> np.ndarray:
        """Return the improvement rate r(age, year), broadcasting integer arrays."""
        i = self._age_index(ages)
        years = _integers(years, "years")
        i, years = np.broadcast_arrays(i, years)
        return _rate(self.rates, self.years, self.long_term_rate, self.long_term_from, i, years)

    def factor(self, ages, years) -> np.ndarray:
        """Return the cumulative factor F(age, year), broadcasting integer arrays."""
        i = self._age_index(ages)
        years = _integers(years, "years")
        if years.size and (years.min() < self.first_year or years.max() > self.last_year):
            raise ValueError(f"calendar years must lie in {self.first_year} to {self.last_year} "
                             f"for a scale with base year {self.base_year}")
        return self.factors[i, years - self.first_year]


def _rate(rates, years_axis, long_term_rate, long_term_from, i, years) -> np.ndarray:
    """r at scale-age indices ``i`` in calendar ``years`` (broadcast integer arrays)."""
    if rates.ndim == 1:
        r = rates[i]
        if long_term_from is not None:
            r = np.where(years >= long_term_from, long_term_rate, r)
        return r
    col = years - years_axis[0]
    inside = rates[i, np.clip(col, 0, years_axis.size - 1)]
    return np.where(col >= years_axis.size, long_term_rate, inside)


def _tabulate(ages, rates, base_year, years_axis, long_term_rate, long_term_from
              ) -> np.ndarray:
    """F(a, y) for every scale age and every year of the window, shape (ages, years)."""
    before = np.arange(base_year - YEARS_BEFORE, base_year)
    after = np.arange(base_year, base_year + YEARS_AFTER)
    i = np.arange(ages.size, dtype=np.int64)[:, None]

    def rate(years):
        return _rate(rates, years_axis, long_term_rate, long_term_from,
                     *np.broadcast_arrays(i, years))

    factors = np.empty((ages.size, YEARS_BEFORE + YEARS_AFTER + 1))
    with np.errstate(over="ignore", under="ignore"):
        # Backwards: F(a, y) = 1 / prod_{t=y}^{base-1} (1 - r(a, t)).
        back = np.cumprod((1.0 - rate(before[None, :]))[:, ::-1], axis=1)
        factors[:, :YEARS_BEFORE] = (1.0 / back)[:, ::-1]
        factors[:, YEARS_BEFORE] = 1.0
        # Forwards: F(a, y) = prod_{t=base}^{y-1} (1 - r(a, t)).
        factors[:, YEARS_BEFORE + 1:] = np.cumprod(1.0 - rate(after[None, :]), axis=1)
    return factors


def _scaled(q: np.ndarray, factors: np.ndarray) -> np.ndarray:
    # A zero rate stays zero even if the factor overflowed to infinity.
    with np.errstate(invalid="ignore", over="ignore"):
        return np.where(q == 0.0, 0.0, np.minimum(q * factors, 1.0))


def project_table(table: MortalityTable, scale: Scale, *, cohort: int | None = None,
                  year: int | None = None) -> MortalityTable:
    """Return ``table`` projected with ``scale``: statically to calendar year ``year``, or
    generationally for the lives born in ``cohort`` (exactly one of the two).

    Static: the rate at attained age a is q(a) F(a, year). Generational: it is
    q(a) F(a, cohort + a), the rate at age a in the calendar year the cohort reaches it.
    Select rates q[x]+s are scaled by the factor of their attained age x + s. Every rate is
    capped at 1; rates at the table's last age (and select rates at attained ages from it on)
    are left as they are, so the table still closes with q = 1. The projected table carries
    no law unless every factor used is exactly 1.

    Raises TableError if the scale does not cover every age of the table, ValueError if
    both or neither of ``cohort`` and ``year`` are given or a calendar year needed lies
    outside the scale's factor window.
    """
    if (cohort is None) == (year is None):
        raise ValueError("give exactly one of cohort (generational) and year (static)")
    if not scale.covers(table.first_age, table.last_age):
        raise TableError(f"the improvement scale covers ages {scale.ages[0]} to "
                         f"{scale.ages[-1]}, the table runs from {table.first_age} to "
                         f"{table.last_age}")

    def factors_at(attained: np.ndarray) -> np.ndarray:
        calendar = attained + cohort if cohort is not None else np.full_like(attained, year)
        return scale.factor(attained, calendar)

    ages = np.arange(table.first_age, table.last_age)      # the closing age stays at 1
    f_ultimate = factors_at(ages)
    q = np.append(_scaled(table.q[:-1], f_ultimate), 1.0)
    unchanged = bool((f_ultimate == 1.0).all())
    select_q = table.select_q
    if table.select_period:
        attained = (table.select_first_age + np.arange(select_q.shape[0])[:, None]
                    + np.arange(select_q.shape[1])[None, :])
        before_end = attained < table.last_age
        f_select = np.ones(select_q.shape)
        f_select[before_end] = factors_at(attained[before_end])
        select_q = np.where(before_end, _scaled(select_q, f_select), select_q)
        unchanged = unchanged and bool((f_select == 1.0).all())
    return MortalityTable.of(table.first_age, q, table.select_first_age, select_q,
                          law=table.law if unchanged else None)
