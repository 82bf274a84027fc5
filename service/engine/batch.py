"""Batch preparation: items checked and turned into arrays (:class:`_Batch`), and the work
they will cost (payment dates, segments), priced before anything is computed and spent in
chunks that bound memory and honour a deadline."""

import math
import time
from dataclasses import dataclass
from functools import cached_property

import numpy as np

from service.engine.checks import _check_item
from service.engine.curves import Curve
from service.engine.errors import DeadlineError, ItemError
from service.engine.items import _EPS, LAST_SURVIVOR, Valuation
from service.engine.survival import Lives, build_lives

#: Payment dates evaluated at once; larger batches are split to bound memory.
_CHUNK_POINTS = 250_000


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

    @cached_property
    def one_life_each(self) -> bool:
        """Whether no item has a second life: then no second survival is looked up, and the
        states are what the general formulas give with it 0 (both and second-only 0)."""
        return bool((self.second < 0).all())

    def state_probabilities(self, own, t):
        """Return the probabilities, at times ``t`` at or after the deferral, that both lives,
        only the first and only the second are alive and the start requirement was met."""
        p1 = self.lives.survival(self.first[own], t)
        if self.one_life_each:
            zero = np.zeros_like(p1)
            return zero, self.reach[own, 0] * p1, zero
        has2 = self.second[own] >= 0
        p2 = np.where(has2, self.lives.survival(np.maximum(self.second[own], 0), t), 0.0)
        both = p1 * p2
        reach = self.reach[own]
        return both, reach[:, 0] * p1 - both, reach[:, 1] * p2 - both

    def weight(self, own, both, one, two):
        """Return the expected fraction of the full amount payable, given the states."""
        if self.one_life_each:  # (both and second-only are 0)
            return self.amounts[own, 1] * one
        a = self.amounts[own]
        return a[:, 0] * both + a[:, 1] * one + a[:, 2] * two

    def life_weight(self, own, t):
        """Return the expected fraction of the full amount payable at ``t`` if not certain."""
        return self.weight(own, *self.state_probabilities(own, t))

    def life_weight_slope(self, own, t):
        """Return d/dt of :meth:`life_weight`."""
        lives = self.lives
        if self.one_life_each:
            d1 = _survival_slope(lives.survival(self.first[own], t),
                                 lives.force(self.first[own], t))
            return self.weight(own, None, self.reach[own, 0] * d1, None)
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


def _check_items(items) -> dict[str, list[str]]:
    """Every item's own problems (``_check_item``), by path in the batch ("3.lives.0.age")."""
    errors: dict[str, list[str]] = {}
    for n, item in enumerate(items):
        for path, msgs in _check_item(item).items():
            errors.setdefault(f"{n}.{path}", []).extend(msgs)
    return errors


def _prepare(tables, items, valuation: Valuation) -> _Batch:
    errors = _check_items(items)
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


def _chunks(cost: np.ndarray):
    """Yield index arrays of consecutive items whose summed cost stays near the chunk size."""
    edges = np.searchsorted(np.cumsum(cost), np.arange(_CHUNK_POINTS, cost.sum() + 1,
                                                       _CHUNK_POINTS), side="right")
    start = 0
    for stop in [*edges.tolist(), len(cost)]:
        if stop > start:
            yield np.arange(start, stop)
            start = stop


def _window_end(batch: _Batch, own):
    u, g, n = batch.deferral[own], batch.guarantee[own], batch.term[own]
    return np.minimum(u + n, np.maximum(u + g, batch.horizon[own]))


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


def _measure_work(batch: _Batch, curve: Curve) -> np.ndarray:
    """Work units of the sensitivities: every payment date (guaranteed ones too), and for
    continuous items the points of a Gauss-Legendre rule on each segment."""
    return np.where(batch.continuous, 4 * _work(batch, curve), _payment_count(batch))
