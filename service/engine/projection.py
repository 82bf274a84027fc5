"""The expected payments of a portfolio of annuities, aggregated by period.

Each item carries its annual amount. Discrete payments are taken date by date (exact
summation): a payment falls in the period that holds its date. Continuous payments are cut at
every period boundary as well as at whole ages, window years and interest nodes, and each
piece is integrated exactly (undiscounted for the expected payment, discounted for its
present value). Periods are months or years from the valuation date, or, for discrete
payments only, every distinct payment time. The total present value is the sum over the items
of amount x factor (by exact summation).
"""

from dataclasses import dataclass

import numpy as np

from service.engine.batch import (
    _chunks,
    _expand,
    _on_time,
    _payment_count,
    _prepare,
    _window_end,
    _work,
)
from service.engine.continuous import _UNDISCOUNTED, _cut, _segment_integral
from service.engine.discrete import _points
from service.engine.errors import ItemError, WorkLimitError
from service.engine.items import Valuation

BUCKETS = {"monthly": 12, "annual": 1, "exact": 0}
#: Times this close are one payment time (dates are sums of j/m).
_TIME_GRID = 1e-9


@dataclass(frozen=True, eq=False)
class Projection:
    """Rows of the aggregated cash flows: a period [start, end) (or one time, start = end),
    the expected payment in it and its present value."""

    start: np.ndarray
    end: np.ndarray
    expected: np.ndarray
    present_value: np.ndarray


def projection_work(batch, curve, per_year: int) -> np.ndarray:
    """Work units: the payment dates, or continuous segments with a cut every period."""
    work = _work(batch, curve)
    count = _payment_count(batch)
    span = np.maximum(_window_end(batch, np.arange(batch.m.size)) - batch.deferral, 0)
    cuts = np.ceil(span * per_year).astype(np.int64) if per_year else 0
    return np.where(batch.continuous, work + cuts * 2, count)


def project(tables, items, amounts, valuation: Valuation, buckets: str = "monthly", *,
            max_work: int | None = None, deadline: float | None = None) -> Projection:
    """Aggregate the expected payments of ``items`` (each at its annual ``amounts[n]``).

    Raises ItemError for items impossible under the tables (and for continuous items with
    ``buckets="exact"``), WorkLimitError beyond ``max_work``, DeadlineError past ``deadline``.
    """
    per_year = BUCKETS[buckets]
    if not per_year:
        bad = {f"{n}.timing": ["continuous payments have no payment times: ask for monthly "
                               "or annual periods"]
               for n, item in enumerate(items) if item.payments.timing == "continuous"}
        if bad:
            raise ItemError(bad)
    batch = _prepare(tables, items, valuation)
    curve = valuation.curve
    if max_work is not None:
        work = int(projection_work(batch, curve, per_year).sum())
        if work > max_work:
            raise WorkLimitError(work, max_work)
    amounts = np.asarray(amounts, dtype=float)
    keys, paid, pv = [], [], []
    discrete = np.flatnonzero(~batch.continuous)
    count = _payment_count(batch)
    for part in _chunks(count[discrete]):
        _on_time(deadline)
        which = discrete[part]
        own, j = _expand(which, np.zeros(which.size, dtype=np.int64), count[which])
        pts = _points(batch, own, j, curve)
        keys.append(_key(pts.time, per_year))
        paid.append(amounts[own] * pts.amount * pts.probability)
        pv.append(amounts[own] * pts.present_value)
    cont = np.flatnonzero(batch.continuous)
    for part in _chunks(projection_work(batch, curve, per_year)[cont]):
        _on_time(deadline)
        cut = _cut(batch, cont[part], curve, per_year=per_year)
        scale = amounts[cut.own] * cut.growth
        keys.append(_key(cut.t1 + cut.length / 2, per_year))
        paid.append(scale * _segment_integral(batch, cut, _UNDISCOUNTED))
        pv.append(scale * _segment_integral(batch, cut, curve))
    if not keys:
        empty = np.zeros(0)
        return Projection(empty, empty, empty, empty)
    key = np.concatenate(keys)
    rows, where = np.unique(key, return_inverse=True)
    expected = np.bincount(where, weights=np.concatenate(paid), minlength=rows.size)
    present = np.bincount(where, weights=np.concatenate(pv), minlength=rows.size)
    if per_year:
        start, end = rows / per_year, (rows + 1) / per_year
    else:
        start = end = rows * _TIME_GRID
    return Projection(start, end, expected, present)


def _key(t, per_year: int):
    """The period of each time: its month or year from now, or the time itself on a grid."""
    if per_year:
        return np.floor(np.asarray(t) * per_year + _TIME_GRID).astype(np.int64)
    return np.rint(np.asarray(t) / _TIME_GRID).astype(np.int64)
