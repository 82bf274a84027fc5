"""A plain per-item reference for single-life annuity values, for the floors benchmark.

Pure Python, one item at a time, no numpy in the loop: the value of an item is, from the
definition, the sum over its payment dates of

    amount x v^t x probability that the payment is made,

with v = 1 / (1 + i) at a flat effective rate i, the probability t_p_x = S(x + t) / S(x)
on the life's own chain of annual rates (select rates while the life is in its select
period, then ultimate; each rate times the multiplier plus the flat extra, capped at 1; 1 at
the table's last age), and within a year of age the fractional-age assumption, each written
from its definition:

- uniform distribution of deaths: l(y + r) = l(y) - r d(y), so r p_y = 1 - r q_y;
- constant force within the year: mu = -ln p_y, so r p_y = exp(-r mu) = p_y ** r;
- Balducci: (1 - r) q_(y + r) = (1 - r) q_y, so r p_y = p_y / (1 - (1 - r) q_y).

Payment conventions (the service's, see the README): the j-th payment (j = 0, 1, ...) covers
the period that starts at u + j / m, u the deferral; it is paid at the start of that period
(in advance) or at its end (in arrears), amount (1 + e)^floor(j / m) / m with e the
escalation. The first g x m payments (g the guarantee in years) are certain once the life is
alive at u; the term, when given, bounds the number of payments to term x m.

This is deliberately the obvious computation: it is the yardstick the engine's speed is
measured against (bench/floors.py) and the engine's values are checked against it.
"""

import math
from dataclasses import dataclass

#: Offsets this close to a whole age are taken as that age (dates are sums of j / m).
SNAP = 1e-9


@dataclass(frozen=True)
class RefItem:
    """One single-life item, in plain Python values."""

    table: int
    age: float
    duration: int | None = None
    age_adjustment: float = 0.0
    multiplier: float = 1.0
    flat_extra: float = 0.0
    timing: str = "advance"  # or "arrears"
    frequency: int = 1
    term: float | None = None  # None: for life
    deferral: float = 0.0
    guarantee: float = 0.0
    escalation: float = 0.0


@dataclass(frozen=True)
class RefTable:
    """A table's rates as Python lists (ultimate by age; select by age at selection)."""

    first_age: int
    q: list
    select_first_age: int
    select_q: list  # select_q[age at selection - select_first_age][year since selection]

    @property
    def last_age(self) -> int:
        return self.first_age + len(self.q) - 1

    @property
    def select_period(self) -> int:
        return len(self.select_q[0]) if self.select_q else 0

    @classmethod
    def of(cls, table) -> "RefTable":
        """Copy a service MortalityTable's rates into plain lists."""
        return cls(int(table.first_age), [float(x) for x in table.q],
                   int(table.select_first_age), [[float(x) for x in row]
                                                 for row in table.select_q])


def fraction_survival(q: float, r: float, assumption: str) -> float:
    """Return r p_y, the probability of surviving r years (0 <= r <= 1) from a whole age y
    whose annual rate is q."""
    if r <= 0.0:
        return 1.0
    p = 1.0 - q
    if assumption == "udd":
        return 1.0 - r * q
    if assumption == "constant-force":
        return p ** r
    if assumption == "balducci":
        return p / (1.0 - (1.0 - r) * q)
    raise ValueError(f"unknown fractional-age assumption {assumption!r}")


def chain(table: RefTable, anchor: int, duration: int | None, multiplier: float,
          flat_extra: float) -> list:
    """Return the life's annual rates q_k for the years from whole age ``anchor`` + k, k = 0,
    1, ..., up to the table's last age (where the rate is 1)."""
    rates = []
    for k in range(table.last_age - anchor + 1):
        y = anchor + k
        if y >= table.last_age:
            rates.append(1.0)
            continue
        if duration is not None and duration + k < table.select_period:
            q = table.select_q[anchor - duration - table.select_first_age][duration + k]
        else:
            q = table.q[y - table.first_age]
        rates.append(min(q * multiplier + flat_extra, 1.0))
    return rates


def value(tables: list, item: RefItem, rate: float, assumption: str) -> float:
    """Return the present value of 1 a year for ``item`` at the flat effective ``rate``."""
    table = tables[item.table]
    x = item.age + item.age_adjustment
    anchor = math.floor(x + SNAP)
    frac = max(x - anchor, 0.0)
    q = chain(table, anchor, item.duration, item.multiplier, item.flat_extra)
    # l[k]: survival from the whole age anchor to anchor + k.
    lives = [1.0]
    for qk in q:
        lives.append(lives[-1] * (1.0 - qk))

    def survival(s: float) -> float:
        """S(anchor + s) relative to S(anchor)."""
        k = math.floor(s + SNAP)
        if k >= len(q):
            return 0.0
        r = min(max(s - k, 0.0), 1.0)
        return lives[k] * fraction_survival(q[k], r, assumption)

    alive_now = survival(frac)
    m = item.frequency
    u = item.deferral
    arrears = 1 if item.timing == "arrears" else 0
    guaranteed = round(item.guarantee * m)
    last = None if item.term is None else round(item.term * m)
    certain = survival(frac + u) / alive_now  # alive at the deferral
    v = 1.0 / (1.0 + rate)
    growth = 1.0 + item.escalation
    total = 0.0
    j = 0
    while last is None or j < last:
        t = u + (j + arrears) / m
        if j < guaranteed:
            p = certain
        else:
            p = survival(frac + t) / alive_now
            if p == 0.0 and last is None:
                break  # for life: every later payment is certainly unpaid
        total += growth ** (j // m) / m * v ** t * p
        j += 1
    return total


def values(tables: list, items: list, rate: float, assumption: str) -> list:
    """Return the value of every item, one at a time."""
    return [value(tables, item, rate, assumption) for item in items]
