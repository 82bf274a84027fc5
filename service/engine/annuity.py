"""Present values and expected payments of life-contingent payment streams, one or two lives.

The conventions (windows, payment dates, guarantees, survivorship) are set out in
:mod:`service.engine.items`.

The item model is :mod:`service.engine.items`, validation :mod:`~service.engine.checks`,
batch preparation and work pricing :mod:`~service.engine.batch`, the valuation itself
:mod:`~service.engine.discrete` and :mod:`~service.engine.continuous`, schedules
:mod:`~service.engine.schedules`; this module is the entry point and re-exports their public
names.
"""

from dataclasses import dataclass

import numpy as np

from service.engine.batch import (
    _Batch,
    _chunks,
    _expand,
    _measure_work,
    _on_time,
    _payment_count,
    _prepare,
    _work,
)
from service.engine.checks import whole_periods_problem
from service.engine.continuous import _continuous_values, _cut, _cut_rule, _weight_in
from service.engine.curves import Curve, Measures, Moments
from service.engine.discrete import _discrete_values, _points
from service.engine.errors import WorkLimitError
from service.engine.items import (
    APPROXIMATIONS,
    EXACT_SUM,
    INTEGRAL,
    INTEGRAL_BY_RULE,
    LAST_SURVIVOR,
    MAX_FREQUENCY,
    START_REQUIREMENTS,
    TIMINGS,
    WOOLHOUSE_SUM,
    Item,
    Life,
    Payments,
    Valuation,
    methods,
)
from service.engine.schedules import Schedule, cash_flow_schedule

__all__ = [
    "APPROXIMATIONS",
    "EXACT_SUM",
    "INTEGRAL",
    "INTEGRAL_BY_RULE",
    "LAST_SURVIVOR",
    "MAX_FREQUENCY",
    "START_REQUIREMENTS",
    "TIMINGS",
    "WOOLHOUSE_SUM",
    "Item",
    "Life",
    "Payments",
    "Schedule",
    "Valuation",
    "Values",
    "annuity_measures",
    "annuity_values",
    "cash_flow_schedule",
    "methods",
    "value_annuities",
    "whole_periods_problem",
]


@dataclass(frozen=True, eq=False)
class Values:
    """Present values of a batch and how each was computed.

    ``method_code[n]`` indexes ``methods`` (see :func:`methods`): the one decision that
    valued item n, so the audit trail cannot say otherwise. Both are arrays, or lists of
    floats and ints where the caller asked for lists (``value_annuities(listed=True)``).
    """

    value: np.ndarray | list
    method_code: np.ndarray | list
    methods: tuple[dict, ...]
    measures: Measures | None = None  # for the items asked for (indexed like the batch)

    def method(self, n: int) -> dict:
        return self.methods[int(self.method_code[n])]


def _columns():
    """:mod:`service.engine.columns` (which builds on this module), imported on first use."""
    global _COLUMNS
    if _COLUMNS is None:
        from service.engine import columns

        _COLUMNS = columns
    return _COLUMNS


_COLUMNS = None


def value_annuities(tables, items, valuation: Valuation, *, max_work: int | None = None,
                    deadline: float | None = None, measure=None,
                    key_rates: bool = False, fast: bool = True,
                    listed: bool = False) -> Values:
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
    listed : give ``value`` and ``method_code`` as lists (for a caller that reads them one
        by one): a few items are then valued without building an array.

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
        done = _columns().dispatch(tables, items, valuation, max_work=max_work,
                                   deadline=deadline, measure=measure, key_rates=key_rates,
                                   listed=listed)
        if done is not None:
            return _as_lists(done) if listed else done
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
    done = Values(values, code, methods(valuation), measures)
    return _as_lists(done) if listed else done


def _as_lists(done: Values) -> Values:
    """``done`` with its values and method codes as lists."""
    if type(done.value) is list:
        return done
    return Values(done.value.tolist(), done.method_code.tolist(), done.methods, done.measures)


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
