"""Insurance factors: the present value of a benefit paid on death (or on survival).

Conventions (times in years from the valuation date; u the deferral, n the term):

- ``whole-life`` pays on death after u; ``term`` on death in (u, u + n]; ``pure-endowment``
  on survival to u + n; ``endowment`` on death in (u, u + n] or on survival to u + n.
- The benefit on death in policy year k (the k-th whole year after u, k = 0, 1, ...) is
  (1 + r)^k, r the escalation; a survival benefit is that of the last policy year.
- ``end-of-year`` pays at the end of the policy year of death, ``end-of-period`` at the end
  of the 1/m of a year in which death occurs, ``moment-of-death`` at once.
- Two lives: ``first-death`` pays when the first of them dies (the joint-life status fails),
  ``second-death`` when the second does (the last-survivor status fails); a survival benefit
  needs both alive (first-death) or either (second-death) at u + n.

With W(t) the probability that the status is still intact at t (single life: t p_x) and D(t)
the discount factor, the death benefit is

    sum_j b_j D(t_j+1) [W(t_j) - W(t_j+1)]          (t_j = u + j/m; m = 1 for end-of-year)
    integral b(t) D(t) (-W'(t)) dt                   (moment of death)

and the moment-of-death integral is taken per segment [a, b] on which nothing changes its
formula as D(a) W(a) - D(b) W(b) - integral F D W, F the forward force of interest (integration
by parts), so the continuous annuity machinery gives it exactly. The second moment is the
same benefit squared at double the force of interest (Bowers et al., Actuarial Mathematics,
the rule of moments), so the variance of the present value is second_moment - value^2.
"""

from dataclasses import dataclass

import numpy as np

from service.engine import integrals
from service.engine.batch import _chunks, _expand, _on_time, _payment_count, _prepare, _work
from service.engine.continuous import _cut, _cut_rule, _life_part, _segment_integral
from service.engine.errors import ItemError, WorkLimitError
from service.engine.items import LAST_SURVIVOR, Item, Life, Payments, Valuation

COVERS = ("whole-life", "term", "endowment", "pure-endowment")
BENEFIT_TIMINGS = ("end-of-year", "end-of-period", "moment-of-death")
STATUSES = ("first-death", "second-death")
#: W(t) as survivorship amounts: the joint-life status, or the last-survivor status.
_STATUS_AMOUNTS = {"first-death": (1.0, 0.0, 0.0), "second-death": (1.0, 1.0, 1.0)}


@dataclass(frozen=True)
class Cover:
    """What is paid, when, and for how long."""

    cover: str = "whole-life"
    term: float | None = None
    deferral: float = 0.0
    escalation: float = 0.0
    benefit_timing: str = "end-of-year"
    frequency: int = 1  # periods a year for end-of-period
    on: str = "first-death"  # two lives


@dataclass(frozen=True)
class Assurance:
    """One insurance item: one or two lives and the cover."""

    lives: tuple[Life, ...]
    cover: Cover = Cover()


@dataclass(frozen=True, eq=False)
class InsuranceValues:
    value: np.ndarray
    second_moment: np.ndarray
    methods: tuple[dict, ...]
    method_code: np.ndarray

    def method(self, n: int) -> dict:
        return self.methods[int(self.method_code[n])]


def _check(items) -> dict[str, list[str]]:
    errors: dict[str, list[str]] = {}
    for n, item in enumerate(items):
        c = item.cover
        if c.cover not in COVERS:
            errors[f"{n}.cover"] = [f"must be one of {', '.join(COVERS)}"]
        elif c.cover != "whole-life" and c.term is None:
            errors[f"{n}.term"] = [f"a {c.cover} cover needs a term"]
        if c.benefit_timing not in BENEFIT_TIMINGS:
            errors[f"{n}.benefit_timing"] = [f"must be one of {', '.join(BENEFIT_TIMINGS)}"]
        if c.on not in STATUSES:
            errors[f"{n}.on"] = [f"must be one of {', '.join(STATUSES)}"]
    return errors


def _annuity_item(item: Assurance) -> Item:
    """The annuity item whose batch carries the same lives, window and W(t)."""
    c = item.cover
    continuous = c.benefit_timing == "moment-of-death"
    m = 1 if c.benefit_timing == "end-of-year" or continuous else c.frequency
    payments = Payments("continuous" if continuous else "arrears", m, c.term, c.deferral, 0.0,
                        c.escalation)
    amounts = _STATUS_AMOUNTS[c.on] if len(item.lives) == 2 else LAST_SURVIVOR
    return Item(item.lives, payments, amounts)


#: The moments: the benefit and the benefit squared, discounted at the curve and at the
#: doubled curve; ``power`` raises the escalation factor.
_POWERS = (1, 2)


def _death_discrete(batch, which, curves, deadline):
    """sum_j b_j D(t_j+1) [W(t_j) - W(t_j+1)] over the periods of the window, for each
    moment, with W evaluated once at every period boundary."""
    count = _payment_count(batch)[which]  # periods that can hold a death
    values = [np.zeros(which.size) for _ in curves]
    local = np.arange(which.size)
    for part in _chunks(count + 1):
        _on_time(deadline)
        o, j = _expand(local[part], np.zeros(part.size, dtype=np.int64), count[part] + 1)
        own = which[o]
        mo = batch.m[own]
        t = batch.deferral[own] + j / mo
        w = batch.life_weight(own, t)
        inner = np.flatnonzero(j < count[o])  # a period starts here; the next point ends it
        died = w[inner] - w[inner + 1]
        year = (j[inner] // mo[inner]) * batch.growth[own[inner]]
        escalating = year.any()  # (else every escalation factor is e^0 = 1)
        ends, owners = t[inner + 1], o[inner]
        for value, curve, power in zip(values, curves, _POWERS, strict=True):
            pv = curve.discount(ends)
            if escalating:
                pv = np.exp(power * year) * pv
            value += np.bincount(owners, weights=pv * died, minlength=which.size)
    return values


def _death_continuous(batch, which, curves, deadline):
    """integral b(t) D(t) (-W'(t)) dt, segment by segment, by parts, for each moment.

    On a segment [a, b] it is D(a) W(a) - D(b-) W(b) - integral F D W, with D(b-) the limit
    from inside the segment (segment rates jump at a band edge) and W evaluated once at every
    segment boundary.
    """
    values = [np.zeros(which.size) for _ in curves]
    for part in _chunks(_work(batch, curves[0])[which] * len(curves)):
        _on_time(deadline)
        cut = _cut(batch, which[part], curves[0])
        a, b = cut.t1, cut.t1 + cut.length
        density = _udd_density(batch, cut) if batch.lives.assumption == "udd" else None
        wa = wb = None
        if density is None or any(curve.curved for curve in curves):
            wa = batch.life_weight(cut.own, a)
            # Where the next segment of the same item starts at this one's end, W is known.
            joined = np.append((cut.owner[1:] == cut.owner[:-1]) & (a[1:] == b[:-1]), False)
            wb = np.empty_like(wa)
            wb[:-1] = wa[1:]
            alone = np.flatnonzero(~joined)
            wb[alone] = batch.life_weight(cut.own[alone], b[alone])
        for value, curve, power in zip(values, curves, _POWERS, strict=True):
            pc = curve.pieces(a, cut.length)
            if density is not None and not curve.curved:
                # Under UDD the density of death is a polynomial within a segment: integrate
                # it against the piece's exponential discount in closed form.
                c0, c1 = density
                died = pc.factor * (c0 * integrals.moment(0, pc.force, cut.length)
                                    - c1 * integrals.moment(1, pc.force, cut.length))
                value[part] += np.bincount(cut.owner, weights=cut.growth**power * died,
                                           minlength=part.size)
                continue
            # D(b-) = factor exp(-force (b - a)): the piece's own formula at its end.
            ends = pc.factor * (wa - np.exp(-pc.force * cut.length) * wb)
            if curve.curved:
                # The forward force varies within a piece: integrate F D W by the rule.
                rule = _cut_rule(batch, cut, curve)
                g = curve.forward_force(rule.time) * batch.life_weight(cut.own[rule.piece],
                                                                       rule.time)
                carried = np.bincount(rule.piece, weights=rule.weight * g, minlength=a.size)
            else:
                carried = pc.force * _segment_integral(batch, cut, curve, pc)
            value[part] += np.bincount(cut.owner, weights=cut.growth**power * (ends - carried),
                                       minlength=part.size)
    return values


def _udd_density(batch, cut):
    """(c0, c1) with -W'(a + h) = c0 - c1 h on each segment, under UDD.

    Each life's survival there is s (alpha - q h), alpha = 1 - q r (s: survival to the start
    of its year of age, r: where the segment starts in it); W is the survivorship-weighted sum
    of S1, S2 and S1 S2 (the start requirement is always 'any' here).
    """
    q1, r1, s1 = _life_part(batch, batch.first[cut.own], cut.t1, cut.mid)
    c0 = s1 * q1
    c1 = np.zeros_like(c0)
    has2 = batch.second[cut.own] >= 0
    if has2.any():
        q2, r2, s2 = _life_part(batch, np.maximum(batch.second[cut.own], 0), cut.t1,
                                   cut.mid)
        q2, s2 = np.where(has2, q2, 0.0), np.where(has2, s2, 0.0)
        a = batch.amounts[cut.own]
        alpha1, alpha2 = 1 - q1 * r1, 1 - q2 * r2
        both = a[:, 0] - a[:, 1] - a[:, 2]
        c0 = (a[:, 1] * s1 * q1 + a[:, 2] * s2 * q2
              + both * s1 * s2 * (q1 * alpha2 + q2 * alpha1))
        c1 = both * s1 * s2 * 2 * q1 * q2
    return c0, c1


def _survival_benefit(batch, items, curves):
    """b D(u + n) W(u + n) for the items with a survival benefit (0 for the others)."""
    pays = np.array([i.cover.cover in ("endowment", "pure-endowment") for i in items])
    values = [np.zeros(len(items)) for _ in curves]
    which = np.flatnonzero(pays)
    if which.size:
        t = batch.deferral[which] + batch.term[which]
        year = np.ceil(batch.term[which] - 1e-9) - 1  # the last policy year
        w = batch.life_weight(which, t)
        for value, curve, power in zip(values, curves, _POWERS, strict=True):
            value[which] = np.exp(power * year * batch.growth[which]) * curve.discount(t) * w
    return values


def methods(valuation: Valuation) -> tuple[dict, ...]:
    """The method blocks of the three benefit timings (``InsuranceValues.method_code``)."""
    words = valuation.curve.method()
    common = {"fractional_age": valuation.fractional_age, "approximation": "exact",
              "discounting": words["discounting"],
              "second_moment": "the same benefit squared at double the force of interest"}
    return tuple(common | {"evaluation": text} for text in (
        "sum over policy years of benefit x discount factor at the year's end x probability "
        "of death in the year",
        "sum over periods of benefit x discount factor at the period's end x probability of "
        "death in the period",
        "integral of benefit x discount x density of death, by parts per segment of age: "
        "D W at the ends less the integral of the force of interest x D W, closed form per "
        "piece; discounting: " + words["continuous"]))


def insurance_values(tables, items, valuation: Valuation, *, max_work: int | None = None,
                     deadline: float | None = None) -> InsuranceValues:
    """Return each item's value and second moment (the same benefit at double the force).

    Raises ItemError (paths such as ``"2.term"``, ``"0.lives.1.age"``), WorkLimitError or
    DeadlineError like :func:`service.engine.annuity.value_annuities`.
    """
    errors = _check(items)
    if errors:
        raise ItemError(errors)
    curves = (valuation.curve, valuation.curve.doubled())
    batch = _prepare(tables, [_annuity_item(i) for i in items], valuation)
    if max_work is not None:
        work = int(_work(batch, curves[0]).sum()) * len(curves)
        if work > max_work:
            raise WorkLimitError(work, max_work)
    death = np.array([i.cover.cover != "pure-endowment" for i in items])
    value, second = _survival_benefit(batch, items, curves)
    for which, death_values in (
            (np.flatnonzero(death & ~batch.continuous), _death_discrete),
            (np.flatnonzero(death & batch.continuous), _death_continuous)):
        if which.size:
            first_part, second_part = death_values(batch, which, curves, deadline)
            value[which] += first_part
            second[which] += second_part
    code = np.array([BENEFIT_TIMINGS.index(i.cover.benefit_timing) for i in items],
                    dtype=np.int8)
    return InsuranceValues(value, second, methods(valuation), code)
