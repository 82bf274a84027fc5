"""Cash-flow schedules: the expected payments behind one item, date by date (or year by
year for continuous payments)."""

from dataclasses import dataclass

import numpy as np

from service.engine.batch import _expand, _payment_count, _prepare, _work
from service.engine.continuous import _segments
from service.engine.discrete import _points
from service.engine.errors import WorkLimitError
from service.engine.items import EXACT_SUM, INTEGRAL, Item, Valuation, methods


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
