"""Survival of individual lives between and across integer ages.

A life aged x = a + f (a an integer, 0 <= f < 1) is described by its annual rates
q_k = q(a + k) for k = 0, 1, ... (select rates first where the life is in its select period,
each multiplied by the life's mortality multiplier and capped at 1), and the basis'
fractional-age assumption, which gives r p_(a+k) for 0 <= r <= 1:

- ``udd`` (uniform distribution of deaths): r p = 1 - r q
- ``constant-force``: r p = p ** r
- ``balducci``: r p = p / (1 - (1 - r) q)

S(a + k + r) = (prod_{j<k} p_j) * r p_(a+k) is the survival function on that chain, and the
probability that the life survives t years is S(x + t) / S(x).
"""

from dataclasses import dataclass

import numpy as np

from service.engine.tables import MortalityTable

ASSUMPTIONS = ("udd", "constant-force", "balducci")
#: Offsets this close to an integer age are taken as that age (payment dates sum j/m).
_SNAP = 1e-9


def by_assumption(table: dict, assumption: str):
    """Return ``table[assumption]``; raise ValueError naming the known assumptions for any
    other name (every dispatch on the fractional-age assumption goes through here)."""
    try:
        return table[assumption]
    except (KeyError, TypeError):
        raise ValueError(f"unknown fractional-age assumption {assumption!r}; known: "
                         f"{', '.join(ASSUMPTIONS)}") from None


def _udd_survival(q, r, p):
    return 1.0 - r * q


def _constant_force_survival(q, r, p):
    with np.errstate(divide="ignore"):
        return np.where(r == 0, 1.0, np.power(p, np.where(r == 0, 1.0, r)))


def _balducci_survival(q, r, p):
    denom = p + r * q
    return np.where(denom > 0, p / np.where(denom > 0, denom, 1.0), 1.0)


_SURVIVAL = {"udd": _udd_survival, "constant-force": _constant_force_survival,
             "balducci": _balducci_survival}


def fraction_survival(q, r, assumption: str):
    """Return r p_y, the probability of surviving r (0 <= r <= 1) years from integer age y."""
    survival = by_assumption(_SURVIVAL, assumption)
    q = np.asarray(q, dtype=float)
    r = np.asarray(r, dtype=float)
    return survival(q, r, 1.0 - q)


def _udd_force(q, r, p):
    denom = 1.0 - r * q
    return np.where(denom > 0, q / np.where(denom > 0, denom, 1.0), np.inf)


def _constant_force_force(q, r, p):
    return -np.log(p)


def _balducci_force(q, r, p):
    denom = p + r * q
    return np.where(denom > 0, q / np.where(denom > 0, denom, 1.0), np.inf)


_FORCE = {"udd": _udd_force, "constant-force": _constant_force_force,
          "balducci": _balducci_force}


def fraction_force(q, r, assumption: str):
    """Return the force of mortality mu at y + r (0 <= r <= 1) within a year of rate q.

    Where the force is infinite (q = 1 at the end of the year) this returns ``inf``.
    """
    force = by_assumption(_FORCE, assumption)
    q = np.asarray(q, dtype=float)
    r = np.asarray(r, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return force(q, r, 1.0 - q)



def between(x, lo, hi):
    """``np.clip(x, lo, hi)`` (the same values, NaN kept) without its Python-level wrapper,
    which costs more than the work on arrays of a few thousand."""
    return np.minimum(np.maximum(x, lo), hi)

@dataclass(frozen=True, eq=False)
class Lives:
    """A vector of lives, each with its own chain of annual rates from its integer age."""

    anchor: np.ndarray  # integer age a
    frac: np.ndarray  # f = x - a, in [0, 1)
    q: np.ndarray  # (n, W) annual rates from the anchor, padded with 1
    cum: np.ndarray  # (n, W + 1) survival from the anchor to each integer offset
    start: np.ndarray  # S(x) relative to the anchor, > 0
    assumption: str
    q_prev: np.ndarray  # rate of the year before the anchor (NaN where there is none)
    law: np.ndarray  # (n, 3) Makeham (A, B, c) of the life's table; NaN where none
    on_law: np.ndarray  # (n, W + 1) the year's rate is the law's (column 0: year before)

    def _locate(self, idx, t):
        s = self.frac[idx] + np.asarray(t, dtype=float)
        k = np.floor(s + _SNAP)
        r = between(s - k, 0.0, 1.0)
        k = between(k, 0, self.q.shape[1]).astype(np.intp)
        return k, r

    def survival(self, idx, t):
        """Return the probability that life ``idx`` survives ``t`` years (arrays broadcast)."""
        idx = np.asarray(idx, dtype=np.intp)
        k, r = self._locate(idx, t)
        qk = self.q[idx, np.minimum(k, self.q.shape[1] - 1)]
        return self.cum[idx, k] * fraction_survival(qk, r, self.assumption) / self.start[idx]

    def force(self, idx, t):
        """Return the force of mortality of life ``idx`` at time ``t``, as Woolhouse needs it.

        - Where the life follows its table's law on both sides of the point (no select rate,
          no multiplier, before the table's closing age; at the table's first age, on the
          side after it), the law's own force A + B c^y.
        - Otherwise, at a whole age y, the estimate -(ln p(y-1) + ln p(y)) / 2 from the life's
          own rates (Dickson, Hardy and Waters, Actuarial Mathematics for Life Contingent
          Risks, section on Woolhouse's formula; recalled from memory), or -ln p(y) where the
          life has no rate for the year before (the table's first age, the year of selection).
        - Between whole ages, the force of the fractional-age assumption within the year.

        Where q = 1 the estimate is infinite.
        """
        idx = np.asarray(idx, dtype=np.intp)
        k, r = self._locate(idx, t)
        last = self.q.shape[1] - 1
        qk = self.q[idx, np.minimum(k, last)]
        within = fraction_force(qk, r, self.assumption)
        before = np.where(k > 0, self.q[idx, np.clip(k - 1, 0, last)], self.q_prev[idx])
        with np.errstate(divide="ignore"):
            here = -np.log1p(-qk)
            prior = -np.log1p(-np.nan_to_num(before))
        whole = np.where(np.isnan(before), here, 0.5 * (prior + here))
        estimate = np.where(r == 0, whole, within)
        # The law: its force at the adjusted age, where the rates on both sides are the law's
        # (at the table's first age only the right side exists).
        col = np.minimum(k, last) + 1  # on_law column 0 is the year before the anchor
        on_law = self.on_law[idx, col] & ((r > 0) | self.on_law[idx, col - 1] | np.isnan(before))
        a, b, c = self.law[idx, 0], self.law[idx, 1], self.law[idx, 2]
        y = self.anchor[idx] + self.frac[idx] + np.asarray(t, dtype=float)
        with np.errstate(invalid="ignore", over="ignore"):
            law = a + b * np.power(np.where(on_law, c, 1.0), y)
        return np.where(on_law, law, estimate)

    def year_rate(self, idx, k):
        """Return q for year ``k`` (integer offset from the anchor) of life ``idx``."""
        return self.q[idx, np.clip(k, 0, self.q.shape[1] - 1)]

    def year_start(self, idx, k):
        """Return S(anchor + k) / S(x): survival from now to the integer offset ``k``."""
        return self.cum[idx, np.clip(k, 0, self.q.shape[1])] / self.start[idx]


def build_lives(tables, table_index, ages, durations, multipliers, assumption: str,
                flat_extras=None):
    """Build :class:`Lives` and return ``(lives, problems)``.

    Parameters
    ----------
    tables : sequence of MortalityTable
    table_index : int array, which table each life follows
    ages : float array, exact ages after any age adjustment
    durations : float array, whole years since selection; ``inf`` for ultimate
    multipliers : float array, factor applied to every q (result capped at 1)
    flat_extras : float array, added to every q after the multiplier (result capped at 1);
        default none
    assumption : one of ``ASSUMPTIONS``

    Returns
    -------
    lives : Lives
    problems : dict mapping a life's position to ``(field, message)``; those lives get a
        harmless placeholder chain and must not be valued.
    """
    if assumption not in ASSUMPTIONS:
        raise ValueError(f"unknown fractional-age assumption {assumption!r}")
    table_index = np.asarray(table_index, dtype=np.intp)
    ages = np.asarray(ages, dtype=float)
    durations = np.asarray(durations, dtype=float)
    multipliers = np.asarray(multipliers, dtype=float)
    extras = (np.zeros(multipliers.shape) if flat_extras is None
              else np.asarray(flat_extras, dtype=float))
    n = ages.size
    problems: dict[int, tuple[str, str]] = {}
    # An age within _SNAP of a whole age is that age (64.02 - 0.02 is 63.99999999999999).
    anchor = np.floor(ages + _SNAP).astype(np.int64)
    lo = np.array([t.first_age for t in tables])[table_index]
    hi = np.array([t.last_age for t in tables])[table_index]
    outside = ~((ages >= lo - _SNAP) & (ages <= hi + _SNAP))
    for pos in np.flatnonzero(outside):
        problems[int(pos)] = ("age", f"age {ages[pos]:g} is outside the table's ages "
                                     f"{lo[pos]} to {hi[pos]}")
    # Lives outside their table get a placeholder chain from its first age.
    anchor = np.where(outside, lo, anchor)
    width = int(max((t.last_age for t in tables), default=0) - anchor.min() + 1) if n else 1
    # Column 0 is the year before the life's integer age (for the force of mortality there);
    # columns 1.. are the life's chain of rates from its integer age.
    chain = np.full((n, width + 1), np.nan)
    selected = np.zeros((n, width + 1), dtype=bool)
    for ti, table in enumerate(tables):
        members = np.flatnonzero(table_index == ti)
        if members.size:
            chain[members], selected[members] = _chain(table, anchor[members], durations[members],
                                                       width, members, problems)
    # The multiplier applies to every rate, but a table that closes with q = 1 stays closed.
    last = np.array([t.last_age for t in tables])[table_index]
    ages_of = anchor[:, None] + np.arange(-1, width)[None, :]
    law = np.array([t.law if t.law is not None else (np.nan,) * 3 for t in tables],
                   dtype=float).reshape(len(tables), 3)[table_index]
    on_law = ((~np.isnan(law[:, :1])) & (multipliers[:, None] == 1.0)
              & (extras[:, None] == 0.0) & ~selected
              & ~np.isnan(chain) & (ages_of < last[:, None]))
    chain = np.where(ages_of >= last[:, None], 1.0,
                     np.minimum(chain * multipliers[:, None] + extras[:, None], 1.0))
    q_prev = chain[:, 0]
    q = chain[:, 1:]
    p = 1.0 - q
    cum = np.ones((n, width + 1))
    cum[:, 1:] = np.cumprod(p, axis=1)
    frac = np.maximum(ages - anchor, 0.0)
    frac = np.where(outside, 0.0, frac)
    start = fraction_survival(q[:, 0], frac, assumption)
    for pos in np.flatnonzero(start <= 0):
        if int(pos) not in problems:
            problems[int(pos)] = ("age", "the life cannot be alive at this age under the "
                                         "adjusted table (survival from its integer age is 0)")
    start = np.where(start > 0, start, 1.0)
    lives = Lives(anchor, frac, q, cum, start, assumption, q_prev, law, on_law)
    return lives, problems


def _chain(table: MortalityTable, anchor, durations, width, members, problems):
    """Rates for years -1, 0, ..., width-1 from each integer age (NaN before the table), and
    which of them are select rates."""
    offsets = np.arange(-1, width)[None, :]
    index = anchor[:, None] - table.first_age + offsets
    rates = np.where(index < 0, np.nan,
                     np.where(index < len(table.q), table.q[np.clip(index, 0, len(table.q) - 1)],
                              1.0))
    period = table.select_period
    if not period:
        return rates, np.zeros(rates.shape, dtype=bool)
    selected = np.flatnonzero(np.isfinite(durations) & (durations < period))
    d = durations[selected].astype(np.int64)
    sel_age = anchor[selected] - d
    known = (sel_age >= table.select_first_age) & (sel_age <= table.select_last_age)
    for row, age in zip(selected[~known], sel_age[~known], strict=True):
        problems.setdefault(int(members[row]), (
            "duration", f"age at selection {age} is outside the select table's ages "
                        f"{table.select_first_age} to {table.select_last_age}"))
    selected, d, sel_age = selected[known], d[known], sel_age[known]
    years = d[:, None] + offsets  # duration in each year of each chain
    in_select = (years >= 0) & (years < period)
    rows, cols = np.nonzero(in_select)
    rates[selected[rows], cols] = table.select_q[sel_age[rows] - table.select_first_age,
                                                 years[rows, cols]]
    is_select = np.zeros(rates.shape, dtype=bool)
    is_select[selected[rows], cols] = True
    # Before selection there is no rate of this life's own history.
    before_rows, before_cols = np.nonzero(years < 0)
    rates[selected[before_rows], before_cols] = np.nan
    return rates, is_select
