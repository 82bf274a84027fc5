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

Continuous payments are cut into blocks of at most 1/12 of a year (and at whole years of the
window, the guarantee's end and the interest structure's nodes); each block's value if paid
in full, the integral of payment rate x discount over it, is exact. A life that dies within
a block is credited half of it (both dying in the same block: a quarter of the block in each
state). So every outcome, percentile and the standard deviation are within half of the
largest block's value of the true ones (about 1/24 of a year's payment): the stated
tolerance ``CONTINUOUS_TOLERANCE_YEARS`` of a year's discounted payment.

The p-th percentile is the smallest value whose cumulative probability is at least p/100
(common practice). The mean of the distribution is the annuity factor, summed exactly (for
continuous payments, to the same tolerance).
"""

from dataclasses import dataclass

import numpy as np

from service.engine import integrals
from service.engine.batch import _on_time, _payment_count, _prepare, _window_end
from service.engine.errors import WorkLimitError
from service.engine.items import Valuation
from service.engine.survival import between as _clip

#: Cumulative probabilities are compared with p/100 less this, so that rounding in the sums
#: does not push a percentile one value up.
_TIE = 1e-12
#: Continuous payments: blocks per year, and the resulting bound on each outcome's error as
#: a fraction of one year's discounted payment (half a block).
BLOCKS_PER_YEAR = 12
CONTINUOUS_TOLERANCE_YEARS = 0.5 / BLOCKS_PER_YEAR


@dataclass(frozen=True, eq=False)
class Spread:
    mean: np.ndarray
    standard_deviation: np.ndarray
    percentiles: list[np.ndarray]  # per item, at that item's levels


def spread_work(batch) -> np.ndarray:
    """Outcomes enumerated per item: the payment dates (or blocks) for one life, their square
    for two."""
    span = np.maximum(_window_end(batch, np.arange(batch.m.size)) - batch.deferral, 0)
    blocks = np.ceil(span * BLOCKS_PER_YEAR).astype(np.int64) + 2
    count = np.where(batch.continuous, blocks, _payment_count(batch)) + 2
    return np.where(batch.second >= 0, count * count, count)


def annuity_spread(tables, items, valuation: Valuation, levels, *,
                   max_work: int | None = None, deadline: float | None = None) -> Spread:
    """Return the mean, standard deviation and percentiles of each item's present value;
    ``levels[n]`` are item n's percentiles, in (0, 100].

    Raises ItemError for items impossible under the tables, WorkLimitError when the outcomes
    to enumerate exceed ``max_work``, DeadlineError past ``deadline``.
    """
    batch = _prepare(tables, items, valuation)
    work = spread_work(batch)
    if max_work is not None and int(work.sum()) > max_work:
        raise WorkLimitError(int(work.sum()), max_work)
    count = _payment_count(batch)
    curve = valuation.curve
    mean = np.zeros(len(items))
    sd = np.zeros(len(items))
    pct = []
    continuous, count = batch.continuous.tolist(), count.tolist()
    for n in range(len(items)):
        _on_time(deadline)
        if continuous[n]:
            values, probs = _continuous_outcomes(batch, n, curve, items[n].start_requires)
        else:
            values, probs = _outcomes(batch, n, count[n], curve, items[n].start_requires)
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
    first = lives.survival(batch.first[n], checkpoints)  # (one life, broadcast)
    if batch.second[n] < 0:
        return _one_life(first, certain, life)
    second = lives.survival(batch.second[n], checkpoints)
    return _two_lives(first, second, certain, life, batch.amounts[n], requires)


def _distribution(survival):
    """P(K = k), k = 0..C, from survival at the C checkpoints (s(c_-1) = 1, s(c_C) = 0)."""
    s = np.concatenate([[1.0], survival, [0.0]])
    return np.maximum(s[:-1] - s[1:], 0.0)


def _made(life, k):
    """The life-contingent payments made by a life that survives k checkpoints: those at
    dates j <= k - 2 (payment j is at checkpoint j + 1; checkpoint 0 is the deferral). For
    continuous blocks: the blocks before block k (block k ends at checkpoint k)."""
    paid = np.concatenate([[0.0], np.cumsum(life)])
    return paid[_clip(k - 1, 0, life.size)]


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


def _blocks(batch, n: int, curve):
    """The blocks of item ``n``'s continuous window: (start, end, value if paid in full)."""
    u = batch.deferral[n]
    end = float(_window_end(batch, np.array([n]))[0])
    if end <= u:
        return np.array([u]), np.array([u]), np.zeros(1)
    years = np.arange(np.floor(u), np.ceil(end) + 1)
    grid = (years[:, None] + np.arange(BLOCKS_PER_YEAR)[None, :] / BLOCKS_PER_YEAR).ravel()
    cuts = np.concatenate([grid, u + np.arange(np.ceil(end - u) + 1), curve.nodes(),
                           [u, end, u + batch.guarantee[n]]])
    cuts = np.unique(cuts[(cuts >= u) & (cuts <= end)])
    a, b = cuts[:-1], cuts[1:]
    pc = curve.pieces(a, b - a)
    full = pc.factor * integrals.certain(pc.force, b - a)
    if curve.curved:
        rule = curve.gauss_rule(a, b - a, order=8, correction=True)
        full = full + np.bincount(rule.piece, weights=rule.weight, minlength=a.size)
    growth = np.exp(np.floor((a + b) / 2 - u) * batch.growth[n])
    return a, b, growth * full


def _continuous_outcomes(batch, n: int, curve, requires: str):
    """Outcomes of a continuous item by the block in which each life dies (see the module
    docstring for the half-block convention)."""
    a, b, full = _blocks(batch, n, curve)
    u = batch.deferral[n]
    certain = (a + b) / 2 < u + batch.guarantee[n]
    guaranteed = full[certain].sum()
    life = np.where(certain, 0.0, full)
    checkpoints = np.concatenate([[u], b])
    lives = batch.lives
    first = lives.survival(batch.first[n], checkpoints)  # (one life, broadcast)
    if batch.second[n] < 0:
        probs = _distribution(first)  # K = 0 dead at u; K = k: dies in block k (1-based)
        k = np.arange(probs.size)
        made = _made(life, k) + 0.5 * _block(life, k)  # blocks before k, half of block k
        return np.where(k >= 1, guaranteed + made, 0.0), probs
    second = lives.survival(batch.second[n], checkpoints)
    p1, p2 = _distribution(first), _distribution(second)
    k1 = np.arange(p1.size)[:, None]
    k2 = np.arange(p2.size)[None, :]
    amounts = batch.amounts[n]
    lo, hi = np.minimum(k1, k2), np.maximum(k1, k2)
    # Blocks before the first death: the both-alive amount; the block of the first death:
    # half both-alive, half the survivor's (a quarter each of the three states when both die
    # in it); blocks between: the survivor's; the block of the second death: half of it.
    survivor = np.where(k1 > k2, amounts[1], amounts[2])
    before = _made(life, lo)
    first_block = _block(life, lo)
    between = _made(life, hi) - _made(life, lo + 1)
    last_block = _block(life, hi)
    apart = (amounts[0] * before + 0.5 * (amounts[0] + survivor) * first_block
             + survivor * (between + 0.5 * last_block))
    together = amounts[0] * before + 0.25 * amounts.sum() * first_block
    values = np.where(k1 == k2, together, apart)
    met = {"any": (k1 >= 1) | (k2 >= 1), "first": np.broadcast_to(k1 >= 1, values.shape),
           "both": (k1 >= 1) & (k2 >= 1)}[requires]
    values = np.where(met, amounts[0] * guaranteed + values, 0.0)
    return values.ravel(), (p1[:, None] * p2[None, :]).ravel()


def _block(life, k):
    """The value of block k (1-based: block k ends at checkpoint k); 0 outside."""
    padded = np.concatenate([[0.0], life, [0.0]])
    return padded[_clip(k, 0, life.size + 1)]
