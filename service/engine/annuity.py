"""Present values and expected payments of life-contingent payment streams, one or two lives.

Conventions (all times in years from the valuation date):

- The payment window opens at the deferral u and lasts ``term`` years (for life when None).
- Discrete payments: m per year of 1/m each. The j-th payment covers the period that starts
  at u + j/m; it is paid at the start of that period (``advance``) or at its end (``arrears``).
  Its amount is (1 + r)^k / m with k = floor(j / m) the year of the window it falls in.
- ``continuous``: payment at rate (1 + r)^floor(t - u) per annum throughout the window.
- A guarantee of g years makes the payments for periods starting before u + g certain,
  provided that some life is alive at u; later payments depend on who is alive.
- Survivorship (both, first_only, second_only) gives the amount payable in each state of the
  two lives; a single life is paid while it is alive.

The value is computed as sum(payment x discount factor x probability of payment), or for
continuous payments as the exact integral of the same product within each year of age.
"""

import math
import numbers
import time
from dataclasses import dataclass
from functools import cached_property

import numpy as np

from service.engine import integrals
from service.engine.curves import Curve, Measures, Moments
from service.engine.errors import DeadlineError, ItemError, WorkLimitError
from service.engine.interest import annuity_certain
from service.engine.survival import ASSUMPTIONS, Lives, build_lives

TIMINGS = ("advance", "arrears", "continuous")
APPROXIMATIONS = ("exact", "woolhouse-2", "woolhouse-3")
#: Who must be alive at the end of the deferral for payments (and the guarantee) to start.
START_REQUIREMENTS = ("any", "first", "both")
MAX_FREQUENCY = 365
#: Payment dates evaluated at once; larger batches are split to bound memory.
_CHUNK_POINTS = 250_000
_EPS = 1e-9


@dataclass(frozen=True)
class Life:
    """One life: exact age, the table it follows, and its underwriting adjustments."""

    age: float
    table: int = 0
    duration: int | None = None
    age_adjustment: float = 0.0
    mortality_multiplier: float = 1.0
    flat_extra: float = 0.0  # added to every q after the multiplier (capped at 1)


@dataclass(frozen=True)
class Payments:
    """The shape of the payment stream (per annum amounts of 1 before escalation)."""

    timing: str = "advance"
    frequency: int = 1
    term: float | None = None
    deferral: float = 0.0
    guarantee: float = 0.0
    escalation: float = 0.0


#: Amounts payable while (both alive, only the first alive, only the second alive).
LAST_SURVIVOR = (1.0, 1.0, 1.0)


@dataclass(frozen=True)
class Item:
    """One annuity: one or two lives, a payment stream and the survivorship amounts."""

    lives: tuple[Life, ...]
    payments: Payments = Payments()
    survivorship: tuple[float, float, float] = LAST_SURVIVOR
    start_requires: str = "any"


@dataclass(frozen=True)
class Valuation:
    """Basis-level settings: interest (a flat effective annual rate or a :class:`Curve`) and
    methods."""

    interest: float | Curve
    fractional_age: str = "udd"
    approximation: str = "exact"

    def __post_init__(self):
        if not isinstance(self.interest, Curve) and not (
                isinstance(self.interest, numbers.Real) and math.isfinite(self.interest)
                and self.interest > -1):
            raise ValueError("interest must be a Curve or a finite rate above -1")
        if self.fractional_age not in ASSUMPTIONS:
            raise ValueError(f"unknown fractional-age assumption {self.fractional_age!r}")
        if self.approximation not in APPROXIMATIONS:
            raise ValueError(f"unknown m-thly approximation {self.approximation!r}")

    @cached_property
    def curve(self) -> Curve:
        """The interest structure (a flat rate is a flat :class:`Curve`)."""
        if isinstance(self.interest, Curve):
            return self.interest
        return Curve.flat(float(self.interest))


#: No discounting: for undiscounted expected amounts.
_UNDISCOUNTED = Curve.flat(0.0)


#: What each kind of valuation did; ``Values.method_code`` indexes these.
EXACT_SUM, WOOLHOUSE_SUM, INTEGRAL, INTEGRAL_BY_RULE = 0, 1, 2, 3

_FORCE_ESTIMATE = (
    "the law's own force A + B c^x where the life follows the basis' law; otherwise at a "
    "whole age -(ln p(x-1) + ln p(x)) / 2 on the life's own rates (-ln p(x) where it has no "
    "rate for the year before), and between whole ages the fractional-age assumption's force")


def methods(valuation: Valuation) -> tuple[dict, ...]:
    """Return the method blocks of exact sums, Woolhouse sums, closed-form integrals and
    integrals by a Gauss-Legendre rule (items valued with their sensitivities).

    The engine decides per item which one it used (``Values.method_code``); these describe
    them for the audit trail.
    """
    frac = valuation.fractional_age
    words = valuation.curve.method()
    exact = {"evaluation": "sum of payment x discount factor x probability of payment",
             "fractional_age": frac, "approximation": "exact",
             "discounting": words["discounting"]}
    woolhouse = {
        "evaluation": (
            "sum of payment x discount factor x probability of payment, with each whole "
            "life-contingent year of the window by Woolhouse's formula; the guarantee, part "
            "years and any year whose Woolhouse value falls outside 0 and the value of its "
            "payments made for certain (or across which segment rates change) are summed "
            "exactly"),
        "fractional_age": frac, "approximation": valuation.approximation,
        "discounting": words["discounting"]}
    if valuation.approximation == "woolhouse-3":
        woolhouse["force_of_mortality"] = _FORCE_ESTIMATE
    if frac == "balducci":
        # Balducci's curve has a pole; see integrals.balducci and integrals.balducci_pair.
        evaluation = ("integral of payment rate x discount x survival per year of age: "
                      "exponential-integral closed form, or Gauss-Legendre exact to "
                      "rounding where the pole is far")
    else:
        evaluation = ("integral of payment rate x discount x survival, closed form per "
                      "year of age")
    integral = {"evaluation": evaluation + "; discounting: " + words["continuous"],
                "fractional_age": frac, "approximation": "exact",
                "discounting": words["discounting"]}
    by_rule = integral | {"evaluation": (
        "integral of payment rate x discount x survival per segment of age by a "
        "Gauss-Legendre rule exact to rounding (the same points give the sensitivities)")}
    return exact, woolhouse, integral, by_rule


# ---------------------------------------------------------------------------------------------
# Validation and the batch arrays


def _multiple_of(value: float, m: int) -> bool:
    scaled = value * m
    return abs(scaled - round(scaled)) <= _EPS * max(1.0, abs(scaled))


_PERIODS = {1: ("year", "years"), 2: ("half-year", "half-years"), 4: ("quarter", "quarters"),
            12: ("month", "months"), 26: ("fortnight", "fortnights"), 52: ("week", "weeks"),
            365: ("day", "days")}


def whole_periods_problem(value: float, m: int, *, least: int = 0) -> str | None:
    """Say why ``value`` years is not a whole number of 1/m-year periods, naming the nearest
    valid value (at least ``least`` periods); None when it is."""
    return None if _multiple_of(value, m) else _not_whole_periods(value, m, least=least)


def _not_whole_periods(value: float, m: int, *, least: int = 0) -> str:
    """Say that ``value`` years is not a whole number of 1/m-year periods, and name the nearest
    valid value (at least ``least`` periods)."""
    one, many = _PERIODS.get(m, (f"period of 1/{m} year", f"periods of 1/{m} year"))
    n = max(least, math.floor(value * m + 0.5))
    how = "" if m in _PERIODS else f" (payments {m} times a year)"
    return (f"{value:.6g} is not a whole number of {many}{how}; "
            f"nearest: {n / m!r} ({n} {one if n == 1 else many})")


def _check_item(item: Item) -> dict[str, list[str]]:
    errors: dict[str, list[str]] = {}

    def add(path, message):
        errors.setdefault(path, []).append(message)

    p = item.payments
    if not 1 <= len(item.lives) <= 2:
        add("lives", "an item has one or two lives")
    if p.timing not in TIMINGS:
        add("timing", f"must be one of {', '.join(TIMINGS)}")
    discrete = p.timing != "continuous"
    if discrete and not (isinstance(p.frequency, int) and 1 <= p.frequency <= MAX_FREQUENCY):
        add("frequency", f"must be a whole number from 1 to {MAX_FREQUENCY}")
    for name in ("deferral", "guarantee"):
        v = getattr(p, name)
        if not (math.isfinite(v) and v >= 0):
            add(name, "must be a finite number of years, zero or more")
    if p.term is not None and not (math.isfinite(p.term) and p.term > 0):
        add("term", "must be a positive number of years, or null for life")
    if not (math.isfinite(p.escalation) and p.escalation > -1):
        add("escalation", "must be a finite rate above -1")
    if ("term" not in errors and p.term is not None and math.isfinite(p.guarantee)
            and p.guarantee > p.term * (1 + 1e-12)):
        add("guarantee", f"a guarantee of {p.guarantee:g} years is longer than the term "
                         f"of {p.term:g} years")
    if discrete and "frequency" not in errors:
        for name in ("term", "deferral", "guarantee"):
            v = getattr(p, name)
            if v is not None and name not in errors and not _multiple_of(v, p.frequency):
                add(name, _not_whole_periods(v, p.frequency, least=int(name == "term")))
    if item.start_requires not in START_REQUIREMENTS:
        add("start_requires", f"must be one of {', '.join(START_REQUIREMENTS)}")
    for k, amount in enumerate(item.survivorship):
        if not (math.isfinite(amount) and 0 <= amount <= 1):
            add(f"survivorship.{k}", "amounts must lie between 0 and 1")
    for n, life in enumerate(item.lives):
        if not math.isfinite(life.age + life.age_adjustment):
            add(f"lives.{n}.age", "must be a finite age")
        m = life.mortality_multiplier
        if not (math.isfinite(m) and m >= 0):
            add(f"lives.{n}.mortality_multiplier", "must be a finite number, zero or more")
        if not (math.isfinite(life.flat_extra) and 0 <= life.flat_extra <= 1):
            add(f"lives.{n}.flat_extra", "must be a number from 0 to 1")
        if life.duration is not None and not (isinstance(life.duration, int)
                                              and life.duration >= 0):
            add(f"lives.{n}.duration", "must be a whole number of years, zero or more")
    return errors


@dataclass(frozen=True, eq=False)
class _Batch:
    """Items as arrays; lives are rows of ``lives``; ``second`` is -1 for one life."""

    lives: Lives
    first: np.ndarray
    second: np.ndarray
    m: np.ndarray
    arrears: np.ndarray
    continuous: np.ndarray
    term: np.ndarray  # inf for life
    deferral: np.ndarray
    guarantee: np.ndarray
    growth: np.ndarray  # ln(1 + escalation)
    amounts: np.ndarray  # (n, 3)
    horizon: np.ndarray  # time after which every life is dead for certain
    certain_weight: np.ndarray  # amount x P(the lives that must be alive at the deferral are)
    guaranteed: np.ndarray  # number of guaranteed payments, g x m (discrete items)
    # (n, 2): the probability that the other life meets the start requirement, by which the
    # first-only (column 0) and second-only (column 1) probabilities at t >= u are scaled
    # down from p1 and p2; 1 where nothing is required of it.
    reach: np.ndarray

    def state_probabilities(self, own, t):
        """Return the probabilities, at times ``t`` at or after the deferral, that both lives,
        only the first and only the second are alive and the start requirement was met."""
        p1 = self.lives.survival(self.first[own], t)
        has2 = self.second[own] >= 0
        p2 = np.where(has2, self.lives.survival(np.maximum(self.second[own], 0), t), 0.0)
        both = p1 * p2
        reach = self.reach[own]
        return both, reach[:, 0] * p1 - both, reach[:, 1] * p2 - both

    def weight(self, own, both, one, two):
        """Return the expected fraction of the full amount payable, given the states."""
        a = self.amounts[own]
        return a[:, 0] * both + a[:, 1] * one + a[:, 2] * two

    def life_weight(self, own, t):
        """Return the expected fraction of the full amount payable at ``t`` if not certain."""
        return self.weight(own, *self.state_probabilities(own, t))

    def life_weight_slope(self, own, t):
        """Return d/dt of :meth:`life_weight`."""
        lives = self.lives
        p1 = lives.survival(self.first[own], t)
        has2 = self.second[own] >= 0
        s2 = np.maximum(self.second[own], 0)
        p2 = np.where(has2, lives.survival(s2, t), 0.0)
        # Where the force is infinite (q = 1) and the life alive, the slope is -inf and the
        # year fails Woolhouse's bounds (it is then summed exactly).
        d1 = _survival_slope(p1, lives.force(self.first[own], t))
        d2 = np.where(has2, _survival_slope(p2, lives.force(s2, t)), 0.0)
        dboth = np.where(has2, d1 * p2 + p1 * d2, 0.0)
        reach = self.reach[own]
        return self.weight(own, dboth, reach[:, 0] * d1 - dboth, reach[:, 1] * d2 - dboth)


def _survival_slope(p, mu):
    """Return d/dt of survival p, -mu p: 0 where p is 0, -inf where mu is."""
    alive = p > 0
    return np.where(alive, -np.where(alive, mu, 0.0) * p, 0.0)


def _prepare(tables, items, valuation: Valuation) -> _Batch:
    errors: dict[str, list[str]] = {}
    for n, item in enumerate(items):
        for path, msgs in _check_item(item).items():
            errors.setdefault(f"{n}.{path}", []).extend(msgs)
    if errors:
        raise ItemError(errors)

    life_rows = [(n, k, life) for n, item in enumerate(items) for k, life in enumerate(item.lives)]
    bad_table = [(n, k) for n, k, life in life_rows if not 0 <= life.table < len(tables)]
    if bad_table:
        raise ItemError({f"{n}.lives.{k}.sex": ["no table for this life in the basis"]
                         for n, k in bad_table})
    lives, problems = build_lives(
        tables,
        [life.table for _, _, life in life_rows],
        [life.age + life.age_adjustment for _, _, life in life_rows],
        [math.inf if life.duration is None else life.duration for _, _, life in life_rows],
        [life.mortality_multiplier for _, _, life in life_rows],
        valuation.fractional_age,
        [life.flat_extra for _, _, life in life_rows],
    )
    if problems:
        raise ItemError({f"{life_rows[pos][0]}.lives.{life_rows[pos][1]}.{field}": [msg]
                         for pos, (field, msg) in sorted(problems.items())})

    count = len(items)
    first = np.zeros(count, dtype=np.intp)
    second = np.full(count, -1, dtype=np.intp)
    for pos, (n, k, _) in enumerate(life_rows):
        (first if k == 0 else second)[n] = pos
    pay = [item.payments for item in items]
    continuous = np.array([p.timing == "continuous" for p in pay], dtype=bool)
    m = np.array([1 if p.timing == "continuous" else p.frequency for p in pay], dtype=np.int64)
    term = np.array([math.inf if p.term is None else p.term for p in pay])
    deferral = np.array([p.deferral for p in pay], dtype=float)
    guarantee = np.array([p.guarantee for p in pay], dtype=float)
    amounts = np.array([item.survivorship if len(item.lives) == 2 else LAST_SURVIVOR
                        for item in items], dtype=float).reshape(count, 3)
    last = np.array([tables[life.table].last_age for _, _, life in life_rows], dtype=float)
    # Who must be alive at the deferral: P(first alive at u), P(second alive at u).
    alive1 = lives.survival(first, deferral)
    alive2 = np.where(second >= 0, lives.survival(np.maximum(second, 0), deferral), 0.0)
    requires = np.array([item.start_requires for item in items], dtype=object)
    needs_first = (requires == "first") | (requires == "both")
    needs_second = (requires == "both") & (second >= 0)
    reach = np.column_stack([np.where(needs_second, alive2, 1.0),
                             np.where(needs_first, alive1, 1.0)])
    start = np.where(needs_first, alive1 * np.where(needs_second, alive2, 1.0),
                     alive1 + alive2 - alive1 * alive2)
    ages = lives.anchor + lives.frac
    # Under UDD a life may survive into the year after the last age; beyond it none does.
    life_horizon = last + 1.0 - ages
    horizon = np.where(second >= 0, np.maximum(life_horizon[first], life_horizon[second]),
                       life_horizon[first])
    return _Batch(
        lives=lives, first=first, second=second, m=m,
        arrears=np.array([p.timing == "arrears" for p in pay], dtype=bool),
        continuous=continuous, term=term, deferral=deferral, guarantee=guarantee,
        growth=np.log1p(np.array([p.escalation for p in pay], dtype=float)),
        amounts=amounts, horizon=horizon, certain_weight=amounts[:, 0] * start,
        guaranteed=np.rint(guarantee * m).astype(np.int64), reach=reach,
    )


# ---------------------------------------------------------------------------------------------
# Discrete payments


def _payment_count(batch: _Batch) -> np.ndarray:
    """Number of payment dates worth evaluating per item (later ones are certainly unpaid)."""
    m = batch.m
    by_life = np.floor(np.maximum(batch.horizon - batch.deferral, -1.0) * m + _EPS) + 1
    by_life = np.maximum(by_life, 0)
    count = np.maximum(by_life, batch.guaranteed)
    return np.minimum(count, np.rint(batch.term * m)).astype(np.int64)  # term: inf for life


def _expand(owner, start, stop):
    """Flatten the integer ranges [start, stop) of each owner into (owner, j) arrays."""
    counts = np.maximum(stop - start, 0)
    own = np.repeat(owner, counts)
    firsts = np.cumsum(counts) - counts
    j = np.arange(counts.sum()) - np.repeat(firsts, counts) + np.repeat(start, counts)
    return own, j


@dataclass(frozen=True, eq=False)
class PaymentPoints:
    """Every evaluated payment date of a set of items, flat."""

    owner: np.ndarray
    time: np.ndarray
    amount: np.ndarray  # instalment per 1 p.a., escalation included
    probability: np.ndarray  # expected fraction of the instalment that is paid
    discount: np.ndarray
    both: np.ndarray
    first_only: np.ndarray
    second_only: np.ndarray

    @property
    def present_value(self):
        return self.amount * self.probability * self.discount


def _points(batch: _Batch, own, j, curve: Curve) -> PaymentPoints:
    m = batch.m[own]
    t = batch.deferral[own] + (j + batch.arrears[own]) / m
    amount = np.exp((j // m) * batch.growth[own]) / m
    both, one, two = batch.state_probabilities(own, t)
    life = batch.weight(own, both, one, two)
    certain = j < batch.guaranteed[own]
    probability = np.where(certain, batch.certain_weight[own], life)
    return PaymentPoints(own, t, amount, probability, curve.discount(t), both, one, two)


def _chunks(cost: np.ndarray):
    """Yield index arrays of consecutive items whose summed cost stays near the chunk size."""
    edges = np.searchsorted(np.cumsum(cost), np.arange(_CHUNK_POINTS, cost.sum() + 1,
                                                       _CHUNK_POINTS), side="right")
    start = 0
    for stop in [*edges.tolist(), len(cost)]:
        if stop > start:
            yield np.arange(start, stop)
            start = stop


def _guaranteed_values(batch: _Batch, which: np.ndarray, delta: float):
    """Present value of the guaranteed payments, in closed form year by year, under one
    constant force of interest ``delta`` (other structures sum the dates).

    Year k of the guarantee holds n_k payments of (1 + r)^k / m, certain once some life is
    alive at the deferral u: its value is P (1 + r)^k v^(u + k) times the annuity-certain of
    n_k / m years payable m-thly (in advance or in arrears).
    """
    count = batch.guaranteed[which]
    years = -(-count // batch.m[which])  # whole or part years of the guarantee
    loc, k = _expand(np.arange(which.size), np.zeros(which.size, dtype=np.int64), years)
    own = which[loc]
    m = batch.m[own]
    payments = np.minimum(m, count[loc] - k * m)
    year = annuity_certain(math.expm1(delta), payments / m, m=m, advance=~batch.arrears[own])
    pv = (batch.certain_weight[own] * np.exp(k * batch.growth[own])
          * np.exp(-delta * (batch.deferral[own] + k)) * year)
    # (bincount of nothing is an integer array)
    return np.bincount(loc, weights=pv, minlength=which.size).astype(float)


def _discrete_values(batch: _Batch, which: np.ndarray, curve: Curve, approximation: str,
                     deadline: float | None = None):
    """Return the values of the discrete items ``which`` and whether Woolhouse valued any
    year of each."""
    count = _payment_count(batch)[which]
    delta = curve.constant_force
    if delta is None:
        # No closed form for the guaranteed years: their dates are summed like the others.
        values = np.zeros(which.size)
        first = np.zeros(which.size, dtype=np.int64)
        guaranteed = np.minimum(batch.guaranteed[which], count)
    else:
        values = np.zeros(which.size)
        first = guaranteed = np.minimum(batch.guaranteed[which], count)
        # One closed form per year of a guarantee, in chunks of years to bound memory.
        for part in _chunks(-(-batch.guaranteed[which] // batch.m[which])):
            _on_time(deadline)
            values[part] = _guaranteed_values(batch, which[part], delta)
    m = batch.m[which]
    local = np.arange(which.size)
    k0, k1 = _woolhouse_years(batch, which, approximation)
    head_stop = np.maximum(np.minimum(k0 * m, count), guaranteed)
    tail_start = np.maximum(k1 * m, head_stop)
    # Ranges of payments summed exactly: before and after the Woolhouse years, and the
    # Woolhouse years whose formula left its bounds.
    owner, lo, hi = [local, local], [first, tail_start], [head_stop, count]
    used = np.zeros(which.size, dtype=bool)
    # Woolhouse years, in chunks of years to bound memory.
    for part in _chunks(np.maximum(k1 - k0, 0)) if (k1 > k0).any() else ():
        _on_time(deadline)
        loc, k, block, ok = _woolhouse_blocks(batch, which, local[part], k0[part], k1[part],
                                              curve, approximation)
        values += np.bincount(loc[ok], weights=block[ok], minlength=which.size)
        used[loc[ok & (block > 0)]] = True  # a year no one can reach tells nothing
        bad = ~ok
        owner.append(loc[bad])
        lo.append(k[bad] * m[loc[bad]])
        hi.append(np.minimum((k[bad] + 1) * m[loc[bad]], count[loc[bad]]))
    owner, lo, hi = np.concatenate(owner), np.concatenate(lo), np.concatenate(hi)
    for part in _chunks(np.maximum(hi - lo, 0)):
        _on_time(deadline)
        o, j = _expand(owner[part], lo[part], hi[part])
        pts = _points(batch, which[o], j, curve)
        values += np.bincount(o, weights=pts.present_value, minlength=which.size)
    return values, used


def _woolhouse_years(batch: _Batch, which: np.ndarray, approximation: str):
    """Return [k0, k1): the whole life-contingent years of each window valued by Woolhouse.

    Empty (k1 = k0) for exact summation and for annual payments; the guarantee and any part
    year at either end are summed exactly.
    """
    m = batch.m[which]
    term = batch.term[which]
    k0 = np.ceil(batch.guarantee[which] - _EPS).astype(np.int64)
    whole_life_years = np.ceil(np.maximum(batch.horizon[which] - batch.deferral[which], 0))
    k1 = np.where(np.isfinite(term), np.floor(np.where(np.isfinite(term), term, 0) + _EPS),
                  whole_life_years).astype(np.int64)
    woolhouse = (approximation != "exact") & (m > 1)
    return k0, np.where(woolhouse, np.maximum(k1, k0), k0)


#: Work units of one continuous segment, by assumption and number of lives, relative to one
#: payment date (measured side by side; bench/ reports the slowest accepted request of each
#: kind). Balducci integrates near its pole by splitting, and two lives compound it.
_SEGMENT_COST = {("udd", 1): 1, ("udd", 2): 2, ("constant-force", 1): 1,
                 ("constant-force", 2): 2, ("balducci", 1): 3, ("balducci", 2): 10}


def _work(batch: _Batch, curve: Curve) -> np.ndarray:
    """Work units per item, each about the cost of valuing one payment date.

    Discrete items: the payment dates summed, plus one unit per year of a guarantee valued
    in closed form (its arrays cost memory though little time). Continuous items: their
    segments, weighted by what integrating one costs under the assumption for one or two
    lives.
    """
    count = _payment_count(batch)
    if curve.constant_force is not None:
        closed = np.minimum(batch.guaranteed, count)
        discrete = count - closed + -(-closed // batch.m)
    else:
        discrete = count
    span = np.maximum(_window_end(batch, np.arange(batch.m.size)) - batch.deferral, 0)
    segments = 3 * np.ceil(span + 2).astype(np.int64) + curve.nodes().size
    two = batch.second >= 0
    assumption = batch.lives.assumption
    weight = np.where(two, _SEGMENT_COST[(assumption, 2)], _SEGMENT_COST[(assumption, 1)])
    return np.where(batch.continuous, segments * weight, discrete)


def _on_time(deadline: float | None) -> None:
    """Raise DeadlineError once ``deadline`` (a time.monotonic() value) has passed."""
    if deadline is not None and time.monotonic() > deadline:
        raise DeadlineError("the valuation passed its deadline")


def _woolhouse_blocks(batch, which, local, k0, k1, curve: Curve, approximation):
    """Value whole life-contingent years of the window by Woolhouse's formula.

    For f(t) = D(t) W(t), D the discount factor and W the expected fraction payable, one year
    [k, k + 1) paid m-thly in advance is approximately f(k) - (m-1)/(2m) (f(k) - f(k+1))
    + (m^2-1)/(12 m^2) (f'(k) - f'(k+1)) (the last term for the three-term form), with
    f'(t) = D(t) W'(t) - F(t) f(t), F the forward force of interest; in arrears add
    (f(k+1) - f(k)) / m. At a flat rate these telescope over a whole life to the textbook
    a-due^(m) = a-due - (m-1)/(2m) - (m^2-1)/(12 m^2) (delta + mu).

    Returns ``(loc, k, block, ok)``: for each year k of each item ``loc``, its Woolhouse value
    and whether that value lies between 0 and the same formula's value for the year's
    payments made for certain at the largest amount. Where the force of mortality is very
    high (near the end of a table) the third term leaves those bounds; a year at whose end
    the status has failed for certain, and under segment rates a year across a band edge,
    are not smooth enough for the formula either. The caller sums such years exactly.
    """
    loc, k = _expand(local, k0, k1)
    own = which[loc]
    m = batch.m[own].astype(float)
    t0 = batch.deferral[own] + k
    t1 = t0 + 1.0
    v0, v1 = curve.discount(t0), curve.discount(t1)
    f0 = v0 * batch.life_weight(own, t0)
    f1 = v1 * batch.life_weight(own, t1)
    a = (m - 1) / (2 * m)
    block = f0 - a * (f0 - f1)
    # The same formula for the year's payments made for certain: no value of the year can
    # exceed it at the largest amount (the two-term form never does; the third term, with a
    # very high force of mortality, can).
    bound = v0 - a * (v0 - v1)
    if approximation == "woolhouse-3":
        b = (m * m - 1) / (12 * m * m)
        # The year's own forces: at its end the limit from inside the year (a forward band
        # or a spot term may change the force exactly there).
        force0 = curve.forward_force(t0)
        force1 = curve.forward_force(np.nextafter(t1, -np.inf))
        with np.errstate(invalid="ignore"):
            g0 = v0 * batch.life_weight_slope(own, t0) - force0 * f0
            g1 = v1 * batch.life_weight_slope(own, t1) - force1 * f1
            block = block + b * (g0 - g1)
        bound = bound + b * (force1 * v1 - force0 * v0)
    arrears = batch.arrears[own]
    block = np.where(arrears, block + (f1 - f0) / m, block)
    bound = batch.amounts[own].max(axis=1) * np.where(arrears, bound + (v1 - v0) / m, bound)
    ok = (block >= 0) & (block <= bound * (1 + 1e-12))  # False for NaN
    # A year at whose end every life is dead for certain (q = 1 within it) is far from the
    # smooth curve the formula assumes.
    ok &= ~((f1 == 0) & (f0 > 0))
    if curve.kind == "segments" and curve.nodes().size:
        # The discount jumps at a band edge: a year with an edge after its start (its end
        # included, where f(t1) would take the next band's rate) is summed exactly.
        edges = curve.nodes()
        nxt = np.searchsorted(edges, t0, side="right")
        ok &= ~((nxt < edges.size) & (edges[np.minimum(nxt, edges.size - 1)] <= t1))
    growth = np.exp(k * batch.growth[own])
    return loc, k, block * growth, ok


# ---------------------------------------------------------------------------------------------
# Continuous payments


@dataclass(frozen=True, eq=False)
class Segments:
    """Pieces of the continuous payment windows within which nothing changes its formula."""

    owner: np.ndarray
    year: np.ndarray  # year of the window, for escalation and schedules
    present_value: np.ndarray
    expected_amount: np.ndarray | None


def _window_end(batch: _Batch, own):
    u, g, n = batch.deferral[own], batch.guarantee[own], batch.term[own]
    return np.minimum(u + n, np.maximum(u + g, batch.horizon[own]))


def _grid(owner, base, step_from, step_to):
    """Times base + k for integer k in [step_from, step_to) per owner."""
    o, k = _expand(owner, step_from, step_to)
    return o, base[o] + k


@dataclass(frozen=True, eq=False)
class _Cut:
    """The segments of a set of windows: piece i is [t1, t1 + length] of item ``own``."""

    owner: np.ndarray  # local index into the items cut
    own: np.ndarray  # batch index
    t1: np.ndarray
    length: np.ndarray
    mid: np.ndarray
    year: np.ndarray  # year of the window, for escalation and schedules
    certain: np.ndarray
    growth: np.ndarray  # (1 + r)^year


def _cut(batch: _Batch, which: np.ndarray, curve: Curve, *, per_year: int = 1) -> _Cut:
    """Cut the windows of ``which`` at whole ages, window years, the guarantee's end and the
    interest structure's nodes, so that nothing changes its formula within a segment
    (``per_year``: also at every 1/per_year of a year from now, for buckets of time)."""
    u = batch.deferral[which]
    end = _window_end(batch, which)
    local = np.arange(which.size)
    span = np.maximum(np.ceil(end - u), 0).astype(np.int64)
    pieces = [_grid(local, u, np.zeros_like(span), span + 1),
              (local, u + batch.guarantee[which]), (local, end)]
    if per_year > 1:
        o, k = _expand(local, np.floor(u * per_year).astype(np.int64),
                       np.ceil(end * per_year).astype(np.int64) + 1)
        pieces.append((o, k / per_year))
    nodes = curve.nodes()
    if nodes.size:
        pieces.append((np.repeat(local, nodes.size), np.tile(nodes, local.size)))
    for life in (batch.first[which], batch.second[which]):
        present = life >= 0
        frac = np.where(present, batch.lives.frac[np.maximum(life, 0)], 0.0)
        lo = np.where(present, np.floor(u + frac), 0).astype(np.int64)
        hi = np.where(present, np.ceil(end + frac) + 1, 0).astype(np.int64)
        pieces.append(_grid(local, -frac, lo, hi))
    owner = np.concatenate([p[0] for p in pieces])
    times = np.concatenate([p[1] for p in pieces])
    times = np.clip(times, u[owner], end[owner])
    order = np.lexsort((times, owner))
    owner, times = owner[order], times[order]
    keep = (owner[1:] == owner[:-1]) & (times[1:] - times[:-1] > 1e-12)
    seg_owner = owner[:-1][keep]
    t1 = times[:-1][keep]
    length = times[1:][keep] - t1
    own = which[seg_owner]
    mid = t1 + length / 2
    year = np.floor(mid - batch.deferral[own]).astype(np.int64)
    certain = mid < batch.deferral[own] + batch.guarantee[own]
    return _Cut(seg_owner, own, t1, length, mid, year, certain,
                np.exp(year * batch.growth[own]))


def _segments(batch: _Batch, which: np.ndarray, curve: Curve, *,
              expected: bool = False) -> Segments:
    """Cut the windows of ``which`` into segments and integrate each (``expected``: also
    the undiscounted expected amount, for schedules)."""
    cut = _cut(batch, which, curve)
    pv = _segment_integral(batch, cut, curve)
    undiscounted = (cut.growth * _segment_integral(batch, cut, _UNDISCOUNTED)
                    if expected else None)
    return Segments(cut.owner, cut.year, cut.growth * pv, undiscounted)


def _life_part(batch, life, t1, mid):
    lives = batch.lives
    k = np.floor(lives.frac[life] + mid).astype(np.int64)
    r = np.clip(lives.frac[life] + t1 - k, 0.0, 1.0)
    return lives.year_rate(life, k), r, lives.year_start(life, k)


def _weight_in(batch, cut: _Cut, piece, t):
    """The integrand without discount at times ``t`` in pieces ``piece``: the certain weight
    in the guarantee, else the expected fraction payable."""
    own = cut.own[piece]
    return np.where(cut.certain[piece], batch.certain_weight[own], batch.life_weight(own, t))


def _rule_shape(assumption, rates):
    """(decay, pole) of the survival within each piece, for :meth:`Curve.gauss_rule`.

    Under a constant force survival decays at -ln p per life; Balducci's survival has a pole
    (p + q r) / q before the piece's start; UDD's is a polynomial.
    """
    decay, pole = 0.0, np.inf
    for q, r in rates:
        alive = q < 1
        if assumption == "constant-force":
            decay = decay + np.where(alive, -np.log1p(-np.where(alive, q, 0.0)), 0.0)
        elif assumption == "balducci":
            with np.errstate(divide="ignore"):
                far = np.where(alive & (q > 0), (1 - q + q * r) / np.where(q > 0, q, 1.0),
                               np.inf)
            pole = np.minimum(pole, far)
    return decay, pole


def _cut_rule(batch, cut: _Cut, curve: Curve, *, order: int = 12):
    """A Gauss-Legendre rule for integral g D over each segment of ``cut`` (see
    :meth:`Curve.gauss_rule`), shaped by the lives' survival within it."""
    q1, r1, _ = _life_part(batch, batch.first[cut.own], cut.t1, cut.mid)
    rates = [(q1, r1)]
    has2 = batch.second[cut.own] >= 0
    if has2.any():
        q2, r2, _ = _life_part(batch, np.maximum(batch.second[cut.own], 0), cut.t1, cut.mid)
        rates.append((np.where(has2, q2, 0.0), r2))
    decay, pole = _rule_shape(batch.lives.assumption, rates)
    return curve.gauss_rule(cut.t1, cut.length, order=order, decay=decay, pole=pole)


def _segment_integral(batch, cut: _Cut, curve: Curve, pc=None):
    """Integrate payment rate x discount x survival over each segment, before escalation.

    Within a segment the discount is D(t1 + h) = factor exp(-force h - curvature h (h - D));
    the closed forms of integrals.py are taken at that force, and on a moving spot curve
    (curvature not 0) the rest is added by a Gauss-Legendre rule exact to rounding.
    """
    own, t1, length, mid, certain = cut.own, cut.t1, cut.length, cut.mid, cut.certain
    pc = curve.pieces(t1, length) if pc is None else pc  # (the caller's, when it has them)
    force = pc.force
    assumption = batch.lives.assumption
    q1, r1, s1 = _life_part(batch, batch.first[own], t1, mid)
    j1 = _single(assumption, q1, r1, force, length) * s1
    has2 = batch.second[own] >= 0
    j2 = np.zeros_like(j1)
    j12 = np.zeros_like(j1)
    rates = [(q1, r1)]
    if has2.any():
        q2, r2, s2 = _life_part(batch, np.maximum(batch.second[own], 0), t1, mid)
        j2 = np.where(has2, _single(assumption, q2, r2, force, length) * s2, 0.0)
        j12 = np.where(has2, _pair(assumption, q1, r1, q2, r2, force, length) * s1 * s2, 0.0)
        rates.append((np.where(has2, q2, 0.0), r2))
    a = batch.amounts[own]
    reach = batch.reach[own]
    life = ((a[:, 0] - a[:, 1] - a[:, 2]) * j12 + a[:, 1] * reach[:, 0] * j1
            + a[:, 2] * reach[:, 1] * j2)
    if certain.any():
        sure = batch.certain_weight[own] * integrals.certain(force, length)
        life = np.where(certain, sure, life)
    value = pc.factor * life
    if curve.curved:
        decay, pole = _rule_shape(assumption, rates)
        rule = curve.gauss_rule(t1, length, order=8, correction=True, decay=decay, pole=pole)
        g = _weight_in(batch, cut, rule.piece, rule.time)
        value = value + np.bincount(rule.piece, weights=rule.weight * g, minlength=t1.size)
    return value


def _single(assumption, q, r, delta, length):
    if assumption == "udd":
        return integrals.udd(q, r, delta, length)
    if assumption == "constant-force":
        return integrals.constant_force(q, r, delta, length)
    return integrals.balducci(q, r, delta, length)


def _pair(assumption, q1, r1, q2, r2, delta, length):
    if assumption == "udd":
        return integrals.udd_pair(q1, r1, q2, r2, delta, length)
    if assumption == "constant-force":
        return integrals.constant_force(q1, r1, delta, length, q2, r2)
    return integrals.balducci_pair(q1, r1, q2, r2, delta, length)


def _continuous_values(batch: _Batch, which: np.ndarray, curve: Curve,
                       deadline: float | None = None):
    values = np.zeros(which.size)
    for part in _chunks(_work(batch, curve)[which]):
        _on_time(deadline)
        seg = _segments(batch, which[part], curve)
        values[part] += np.bincount(seg.owner, weights=seg.present_value, minlength=part.size)
    return values


# ---------------------------------------------------------------------------------------------
# Entry points


@dataclass(frozen=True, eq=False)
class Values:
    """Present values of a batch and how each was computed.

    ``method_code[n]`` indexes ``methods`` (see :func:`methods`): the one decision that
    valued item n, so the audit trail cannot say otherwise.
    """

    value: np.ndarray
    method_code: np.ndarray
    methods: tuple[dict, ...]
    measures: Measures | None = None  # for the items asked for (indexed like the batch)

    def method(self, n: int) -> dict:
        return self.methods[int(self.method_code[n])]


def value_annuities(tables, items, valuation: Valuation, *, max_work: int | None = None,
                    deadline: float | None = None, measure=None,
                    key_rates: bool = False, fast: bool = True) -> Values:
    """Return the present value of 1 p.a. for each item, and the method that valued it.

    Parameters
    ----------
    tables : sequence of MortalityTable; ``Life.table`` indexes it
    items : sequence of Item
    valuation : Valuation (interest, fractional-age assumption, m-thly approximation)

    max_work : optional bound on the work units (see ``_work``: about one per payment date
        or segment); beyond it nothing is computed.
    deadline : optional time.monotonic() value after which the valuation is abandoned
        (checked between chunks of work).
    measure : optional boolean mask of the items whose sensitivities are wanted too
        (``Values.measures``, see :func:`annuity_measures`; ``key_rates``: with key-rate
        durations). Where no Woolhouse value is wanted, those items are valued from the same
        payments in one pass: discrete dates summed, continuous segments integrated by the
        Gauss-Legendre rule (method ``INTEGRAL_BY_RULE``).
    fast : value the items :mod:`service.engine.columns` covers there (the same values to
        rounding, on shared chains); False values every item here.

    Raises
    ------
    ItemError
        With paths such as ``"3.lives.0.age"`` for items impossible under the tables.
    WorkLimitError
        When the batch needs more than ``max_work`` work units.
    DeadlineError
        When the deadline passes.
    """
    if fast:
        from service.engine import columns  # (it builds on this module)

        done = columns.dispatch(tables, items, valuation, max_work=max_work,
                                deadline=deadline, measure=measure, key_rates=key_rates)
        if done is not None:
            return done
    if not isinstance(items, list | tuple):
        items = list(items)  # (a batch held as columns: its items, built)
    batch = _prepare(tables, items, valuation)
    curve = valuation.curve
    size = len(items)
    measure = np.zeros(size, dtype=bool) if measure is None else np.asarray(measure, bool)
    # Items with sensitivities are valued from the same payments, unless Woolhouse is wanted.
    together = measure & (valuation.approximation == "exact")
    if max_work is not None:
        work = int(_work(batch, curve)[~together].sum()
                   + _measure_work(batch, curve)[measure].sum())
        if work > max_work:
            raise WorkLimitError(work, max_work)
    values = np.zeros(size)
    code = np.full(size, INTEGRAL, dtype=np.int8)
    discrete = np.flatnonzero(~batch.continuous & ~together)
    if discrete.size:
        values[discrete], used = _discrete_values(batch, discrete, curve,
                                                  valuation.approximation, deadline)
        code[discrete] = np.where(used, WOOLHOUSE_SUM, EXACT_SUM)
    cont = np.flatnonzero(batch.continuous & ~together)
    if cont.size:
        values[cont] = _continuous_values(batch, cont, curve, deadline)
    measures = None
    if measure.any():
        measures = _moments(batch, np.flatnonzero(measure), curve, key_rates,
                            deadline).measures()
        values[together] = measures.value[together]
        code[together] = np.where(batch.continuous[together], INTEGRAL_BY_RULE, EXACT_SUM)
    return Values(values, code, methods(valuation), measures)


def _measure_work(batch: _Batch, curve: Curve) -> np.ndarray:
    """Work units of the sensitivities: every payment date (guaranteed ones too), and for
    continuous items the points of a Gauss-Legendre rule on each segment."""
    return np.where(batch.continuous, 4 * _work(batch, curve), _payment_count(batch))


def annuity_measures(tables, items, valuation: Valuation, *, key_rates: bool = True,
                     max_work: int | None = None, deadline: float | None = None) -> Measures:
    """Return each item's value with its sensitivities to the interest structure.

    Duration -(1/V) dV/dy, convexity (1/V) d2V/dy2 and the key-rate durations, for shifts y of
    the continuously compounded rates (see :mod:`service.engine.curves`), computed from the
    expected payments: sum t PV / V and so on, never by revaluing. Discrete payments are
    taken date by date (exact summation, also under a Woolhouse basis); continuous ones by a
    Gauss-Legendre rule on each segment, exact to rounding for the integrands involved.
    The value returned is that of the same payments, so it is the exact value.
    """
    batch = _prepare(tables, items, valuation)
    curve = valuation.curve
    if max_work is not None:
        work = int(_measure_work(batch, curve).sum())
        if work > max_work:
            raise WorkLimitError(work, max_work)
    every = np.arange(len(items))
    return _moments(batch, every, curve, key_rates, deadline).measures()


def _moments(batch: _Batch, which: np.ndarray, curve: Curve, key_rates: bool,
             deadline: float | None) -> Moments:
    """Sums of PV, t PV, t^2 PV and the key-rate exposures of the items ``which`` (indexed
    like the batch), from their payments: dates, or Gauss-Legendre points of segments."""
    size = batch.m.size
    total = Moments(np.zeros(size), np.zeros(size), np.zeros(size),
                    np.zeros((size, curve.size)) if key_rates else None)
    discrete = which[~batch.continuous[which]]
    count = _payment_count(batch)
    for part in _chunks(count[discrete]):
        _on_time(deadline)
        items = discrete[part]
        own, j = _expand(items, np.zeros(items.size, dtype=np.int64), count[items])
        pts = _points(batch, own, j, curve)
        total = total + curve.moments(own, pts.time, pts.present_value, size,
                                      key_rates=key_rates)
    cont = which[batch.continuous[which]]
    # A rule has about 8 points per segment: chunks of an eighth of the usual work. Order 8
    # is exact to rounding once pieces are split by their variation (Curve.gauss_rule).
    for part in _chunks(_work(batch, curve)[cont] * 8):
        _on_time(deadline)
        cut = _cut(batch, cont[part], curve)
        rule = _cut_rule(batch, cut, curve, order=8)
        pv = rule.weight * cut.growth[rule.piece] * _weight_in(batch, cut, rule.piece,
                                                               rule.time)
        total = total + curve.moments(cut.own[rule.piece], rule.time, pv, size,
                                      key_rates=key_rates)
    return total


def annuity_values(tables, items, valuation: Valuation, *, max_work: int | None = None
                   ) -> np.ndarray:
    """Return the present value of 1 p.a. for each item (see :func:`value_annuities`)."""
    return value_annuities(tables, items, valuation, max_work=max_work).value


@dataclass(frozen=True, eq=False)
class Schedule:
    """The expected payments behind one item (per 1 p.a.; scale by the annual amount)."""

    time: np.ndarray
    payment: np.ndarray
    probability: np.ndarray
    discount: np.ndarray
    present_value: np.ndarray
    both: np.ndarray
    first_only: np.ndarray
    second_only: np.ndarray
    method: dict


def cash_flow_schedule(tables, item: Item, valuation: Valuation, *,
                       max_work: int | None = None) -> Schedule:
    """Return one row per possible payment date of ``item`` (exact summation).

    For continuous payments there is one row per year of the window: ``time`` is the start of
    that year, ``payment`` the amount payable over it if every payment is made, ``probability``
    the expected amount paid divided by ``payment``, ``discount`` the ratio of the year's exact
    present value to its expected amount, and ``present_value`` that exact present value; the
    state probabilities are those at the start of the year.
    """
    batch = _prepare(tables, [item], valuation)
    curve = valuation.curve
    # Every date of a schedule is a row: its work is its dates, guaranteed ones included.
    work = int(_payment_count(batch)[0]) if not batch.continuous[0] else int(
        _work(batch, curve)[0])
    if max_work is not None and work > max_work:
        raise WorkLimitError(work, max_work)
    which = np.array([0])
    if not batch.continuous[0]:
        own, j = _expand(which, np.zeros(1, dtype=np.int64), _payment_count(batch))
        pts = _points(batch, own, j, curve)
        return Schedule(pts.time, pts.amount, pts.probability, pts.discount, pts.present_value,
                        pts.both, pts.first_only, pts.second_only,
                        methods(valuation)[EXACT_SUM])
    seg = _segments(batch, which, curve, expected=True)
    years = int(seg.year.max()) + 1 if seg.year.size else 0
    pv = np.bincount(seg.year, weights=seg.present_value, minlength=years)
    expected = np.bincount(seg.year, weights=seg.expected_amount, minlength=years)
    u = batch.deferral[0]
    start = u + np.arange(years, dtype=float)
    stop = np.minimum(start + 1.0, u + batch.term[0])
    payment = (stop - start) * np.exp(np.arange(years) * batch.growth[0])
    with np.errstate(invalid="ignore", divide="ignore"):
        probability = np.where(payment > 0, expected / payment, 0.0)
        discount = np.where(expected > 0, pv / np.where(expected > 0, expected, 1.0),
                            curve.discount(start))
    both, one, two = batch.state_probabilities(np.zeros(years, dtype=np.intp), start)
    return Schedule(start, payment, probability, discount, pv, both, one, two,
                    methods(valuation)[INTEGRAL])
