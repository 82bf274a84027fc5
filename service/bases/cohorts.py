"""The mortality tables one request's lives follow.

A basis without improvement lends its own tables. A basis with a static projection lends its
tables projected to the stated year (built once per basis). Under a generational projection
each life follows its cohort's table: a life whose (rated) integer age is x at a valuation
date in calendar year Y follows, at age x + t, the rates of calendar year Y + t, so its
cohort is Y - x. Each (table, cohort) is projected once and shared by every life of that
cohort in the request (and kept for later requests in a bounded cache).
"""

import math
from functools import lru_cache

from service.engine.improvement import project_table

#: An age within this of a whole age is that age (as the engine reads ages).
_SNAP = 1e-9
#: Cohort tables kept between requests (each a few kilobytes).
_CACHED_COHORTS = 4096


class CohortError(ValueError):
    """A cohort the basis' improvement scale cannot project (too far from its base year)."""


class RequestTables:
    """The tables of one request, growing by cohort as lives are placed."""

    def __init__(self, basis, valuation_date=None):
        self.basis = basis
        self.valuation_date = valuation_date
        improvement = basis.improvement
        self.generational = improvement is not None and improvement.projection == "generational"
        if improvement is None:
            self.tables = list(basis.tables)
        elif self.generational:
            self.tables = []
        else:
            self.tables = list(_static_tables(basis))
        self._placed: dict[tuple[int, int], int] = {}

    def index(self, base: int, rated_age: float) -> int:
        """The index in ``tables`` of the table a life of basis table ``base`` follows, its
        age after any rating being ``rated_age``. Raises CohortError when the scale cannot
        reach that cohort."""
        if not self.generational:
            return base
        cohort = cohort_of(self.valuation_date, rated_age)
        key = (base, cohort)
        if key not in self._placed:
            self.tables.append(cohort_table(self.basis, base, cohort))
            self._placed[key] = len(self.tables) - 1
        return self._placed[key]

    def placeholder(self) -> int:
        """The index of some table, for a life that is refused and will not be valued."""
        if not self.generational:
            return 0
        return self.index(0, float(self.basis.tables[0].first_age)
                          + self.valuation_date.year - self.basis.improvement.scale.base_year)

    @property
    def cohorts(self) -> int:
        """How many cohort tables this request built or borrowed."""
        return len(self._placed)


def cohort_of(valuation_date, rated_age: float) -> int:
    """The cohort of a life aged ``rated_age`` at ``valuation_date``: the calendar year in
    which it is at integer age 0 by the projection's reckoning (valuation year - floor age)."""
    return valuation_date.year - math.floor(rated_age + _SNAP)


@lru_cache(maxsize=_CACHED_COHORTS)
def cohort_table(basis, base: int, cohort: int):
    """Basis table ``base`` projected generationally for ``cohort`` (cached: bases are
    immutable and hashed by identity)."""
    try:
        return project_table(basis.tables[base], basis.improvement.scale, cohort=cohort)
    except ValueError as exc:
        raise CohortError(f"the improvement scale cannot project the cohort of {cohort} "
                          f"({exc})") from None


@lru_cache(maxsize=64)
def _static_tables(basis) -> tuple:
    year = basis.improvement.year
    return tuple(project_table(t, basis.improvement.scale, year=year) for t in basis.tables)
