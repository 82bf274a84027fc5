"""The spread of an annuity's present value: its standard deviation and percentiles.

The present value Y of an annuity's payments is a random variable of the lives' future
lifetimes. For discrete payments it takes finitely many values, one for each combination of
"how many of the payment dates each life survives", and this module enumerates them exactly:

- One life: payment j (j at or after the guarantee) is made if the life is alive at its date
  t_j, so the payments made are the first k of them; k has probability
  S(t_(k-1)) - S(t_k) given the life is alive at the deferral u (S(t_-1) = S(u)), and the life
  dead at u gives Y = 0 (unless nothing is required of it).
- Two lives: each life's count K_i of checkpoints survived (u, then each payment date) has
  probability s_i(c_(k-1)) - s_i(c_k); the lives are independent, so the pairs (K_1, K_2)
  have the product probabilities, and Y follows from prefix sums of the payments' present
  values: the both-alive amount while both live, the survivor's amount after.

The guaranteed payments are made (at the both-alive amount) whenever the start requirement
is met at u, so a guaranteed annuity has an atom at its guaranteed value.

The p-th percentile is the smallest value whose cumulative probability is at least p/100
(common practice). The mean of the distribution is the annuity factor, summed exactly.
"""

from dataclasses import dataclass

import numpy as np

from service.engine import annuity as _a
from service.engine.annuity import Valuation
from service.engine.errors import ItemError, WorkLimitError

#: Cumulative probabilities are compared with p/100 less this, so that rounding in the sums
#: does not push a percentile one value up.
_TIE = 1e-12


@dataclass(frozen=True, eq=False)
class Spread:
    mean: np.ndarray
    standard_deviation: np.ndarray
    percentiles: list[np.ndarray]  # per item, at that item's levels


def spread_work(batch) -> np.ndarray:
    """Outcomes enumerated per item: the payment dates for one life, their square for two."""
    count = _a._payment_count(batch) + 2
    return np.where(batch.second >= 0, count * count, count)


def annuity_spread(tables, items, valuation: Valuation, levels, *,
                   max_work: int | None = None, deadline: float | None = None) -> Spread:
    """Return the mean, standard deviation and percentiles of each discrete item's present
    value; ``levels[n]`` are item n's percentiles, in (0, 100].

    Raises ItemError for continuous items (their spread is not enumerated), WorkLimitError
    when the outcomes to enumerate exceed ``max_work``, DeadlineError past ``deadline``.
    """
    continuous = [n for n, item in enumerate(items) if item.payments.timing == "continuous"]
    if continuous:
        raise ItemError({f"{n}.spread": ["the spread is computed for advance and arrears "
                                         "payments only"] for n in continuous})
    batch = _a._prepare(tables, items, valuation)
    work = spread_work(batch)
    if max_work is not None and int(work.sum()) > max_work:
        raise WorkLimitError(int(work.sum()), max_work)
    count = _a._payment_count(batch)
    curve = valuation.curve
    mean = np.zeros(len(items))
    sd = np.zeros(len(items))
    pct = []
    for n in range(len(items)):
        _a._on_time(deadline)
        values, probs = _outcomes(batch, n, int(count[n]), curve, items[n].start_requires)
        order = np.argsort(values, kind="stable")
        values, probs = values[order], probs[order]
        mean[n] = np.dot(probs, values)
        second = np.dot(probs, values * values)
        sd[n] = np.sqrt(max(second - mean[n] ** 2, 0.0))
        cum = np.cumsum(probs)
        at = np.searchsorted(cum, np.asarray(levels[n], dtype=float) / 100.0 - _TIE,
                             side="left")
        pct.append(values[np.minimum(at, values.size - 1)])
    return Spread(mean, sd, pct)


def _outcomes(batch, n: int, count: int, curve, requires: str):
    """Every value the present value of item ``n`` can take, with its probability."""
    j = np.arange(count)
    m = batch.m[n]
    u = batch.deferral[n]
    t = u + (j + batch.arrears[n]) / m
    pv = np.exp((j // m) * batch.growth[n]) / m * curve.discount(t)
    g = min(int(batch.guaranteed[n]), count)
    certain = pv[:g].sum()
    life = np.where(j >= g, pv, 0.0)
    checkpoints = np.concatenate([[u], t])
    lives = batch.lives
    first = lives.survival(np.full(count + 1, batch.first[n]), checkpoints)
    if batch.second[n] < 0:
        return _one_life(first, certain, life)
    second = lives.survival(np.full(count + 1, batch.second[n]), checkpoints)
    return _two_lives(first, second, certain, life, batch.amounts[n], requires)


def _distribution(survival):
    """P(K = k), k = 0..C, from survival at the C checkpoints (s(c_-1) = 1, s(c_C) = 0)."""
    s = np.concatenate([[1.0], survival, [0.0]])
    return np.maximum(s[:-1] - s[1:], 0.0)


def _made(life, k):
    """The life-contingent payments made by a life that survives k checkpoints: those at
    dates j <= k - 2 (payment j is at checkpoint j + 1; checkpoint 0 is the deferral)."""
    paid = np.concatenate([[0.0], np.cumsum(life)])
    return paid[np.clip(k - 1, 0, life.size)]


def _one_life(survival, certain, life):
    """Y by the number of checkpoints survived: 0 if dead at the deferral, else the guarantee
    and the payments at the dates survived."""
    probs = _distribution(survival)
    k = np.arange(probs.size)
    return np.where(k >= 1, certain + _made(life, k), 0.0), probs


def _two_lives(first, second, certain, life, amounts, requires):
    """Y for each pair of checkpoint counts: while both live the both-alive amount, then the
    survivor's; nothing unless the start requirement is met at the deferral."""
    p1, p2 = _distribution(first), _distribution(second)
    k1 = np.arange(p1.size)[:, None]
    k2 = np.arange(p2.size)[None, :]
    both = _made(life, np.minimum(k1, k2))
    longest = _made(life, np.maximum(k1, k2))
    survivor = np.where(k1 > k2, amounts[1], np.where(k2 > k1, amounts[2], 0.0))
    met = {"any": (k1 >= 1) | (k2 >= 1), "first": np.broadcast_to(k1 >= 1, (p1.size, p2.size)),
           "both": (k1 >= 1) & (k2 >= 1)}[requires]
    values = np.where(met, amounts[0] * (certain + both) + survivor * (longest - both), 0.0)
    return values.ravel(), (p1[:, None] * p2[None, :]).ravel()
