"""Interest structures: the integrated engine on a flat rate, a spot curve, segments and bands.

The same 10,000 mixed single-life items (monthly in advance: whole life, some guaranteed;
temporary; deferred; and a fifth continuous, whole life, temporary or deferred) are valued by
``value_annuities`` at a flat rate, on a 30-term spot curve, on segment rates and on forward
bands, and valued with every measure (``value_annuities`` with ``measure`` and
key-rate durations, as the API does for items that ask for duration, convexity and key-rate
durations). The configurations are timed in turn within one run; each figure is the median
of the repeats, and the ratios are what the targets speak of:

- on the 30-term spot curve, the batch takes at most 2x the same batch at a flat rate;
- asking for every measure takes at most 1.5x more again (value and measures together,
  against the value alone on the same structure).

A correctness guard, not a timing: a one-term spot curve at the flat rate's level gives the
flat rate's values and measures to 1e-12 (relative).

    .venv/bin/python bench/run.py --only curves [--items N] [--repeats R]
"""

import numpy as np

from bench.common import Figure, Section, environment, median, side_by_side, table, verdict
from service import create_app
from service.engine.annuity import (
    Item,
    Life,
    Payments,
    Valuation,
    annuity_measures,
    value_annuities,
)
from service.engine.curves import Curve

FLAT_RATE = 0.05
#: An invented upward-sloping spot curve with a term for each year from 1 to 30.
SPOT_30 = {"kind": "spot", "terms": list(range(1, 31)),
           "rates": [round(0.03 + 0.012 * (1 - np.exp(-k / 8)), 6) for k in range(1, 31)]}
STRUCTURES = {
    "flat": {"kind": "flat", "rate": FLAT_RATE},
    "spot": SPOT_30,
    "segments": {"kind": "segments", "edges": [5, 20], "rates": [0.045, 0.052, 0.055]},
    "forward": {"kind": "forward", "edges": [10], "rates": [0.05, 0.035]},
}
LABELS = {"flat": "flat rate", "spot": "spot curve, 30 terms",
          "segments": "segment rates, 3 bands", "forward": "forward bands, 2"}
#: Targets (issue 9): spot against flat, and every measure against the value alone.
STRUCTURE_TARGET = 2.0
MEASURES_TARGET = 1.5
GUARD_TOLERANCE = 1e-12
#: Items the guard compares (every shape of the mix is among them).
GUARD_ITEMS = 1000


def mixed_items(n: int, seed: int = 2026) -> list[Item]:
    """Return ``n`` single-life items: 30% monthly whole life (a third guaranteed 5 or 10
    years), 25% monthly temporary, 25% monthly deferred, 20% continuous (whole life,
    temporary or deferred), escalating at 0 or 2% a year."""
    rng = np.random.default_rng(seed)
    shape = rng.choice(4, n, p=[0.30, 0.25, 0.25, 0.20])
    ages = rng.uniform(40, 90, n)
    escalation = rng.choice([0.0, 0.02], n)
    guarantee = rng.choice([0.0, 0.0, 5.0, 10.0], n)
    term = rng.integers(5, 31, n).astype(float)
    deferral = rng.integers(1, 26, n).astype(float)
    style = rng.integers(0, 3, n)
    items = []
    for k in range(n):
        age, r = round(float(ages[k]), 2), float(escalation[k])
        if shape[k] == 0:
            pay = Payments("advance", 12, None, 0.0, float(guarantee[k]), r)
        elif shape[k] == 1:
            pay = Payments("advance", 12, float(term[k]), 0.0, 0.0, r)
        elif shape[k] == 2:
            age = min(age, 64.0)
            pay = Payments("advance", 12, None, float(deferral[k]), 0.0, r)
        else:
            term_k = float(term[k]) if style[k] == 1 else None
            defer_k = float(deferral[k]) if style[k] == 2 else 0.0
            pay = Payments("continuous", 1, term_k, defer_k, 0.0, r)
        items.append(Item((Life(age),), pay))
    return items


def _everything(tables, items, valuation):
    """Values with every measure, as the API asks for them: one pass."""
    value_annuities(tables, items, valuation, measure=[True] * len(items), key_rates=True)


def guard(tables, items, fractional_age: str) -> float:
    """Return the largest relative difference between the values and measures at the flat
    rate and on a one-term spot curve at the same level."""
    flat = Valuation(Curve.flat(FLAT_RATE), fractional_age)
    one = Valuation(Curve.from_mapping({"kind": "spot", "terms": [10.0],
                                        "rates": [FLAT_RATE]}), fractional_age)
    worst = 0.0
    a, b = value_annuities(tables, items, flat).value, value_annuities(tables, items, one).value
    pairs = [(a, b)]
    ma = annuity_measures(tables, items, flat, key_rates=True)
    mb = annuity_measures(tables, items, one, key_rates=True)
    pairs += [(ma.value, mb.value), (ma.duration, mb.duration), (ma.convexity, mb.convexity),
              (ma.key_rate_durations, mb.key_rate_durations)]
    for x, y in pairs:
        x, y = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
        both = np.isfinite(x) & np.isfinite(y)
        if not np.array_equal(np.isfinite(x), np.isfinite(y)):
            return np.inf
        diff = np.abs(x[both] - y[both]) / np.maximum(1.0, np.abs(x[both]))
        worst = max(worst, float(diff.max(initial=0.0)))
    return worst


def run(items_count: int = 10_000, repeats: int = 3) -> Section:
    basis = create_app().extensions["registry"].resolve("standard-ultimate")
    tables, frac = basis.tables, basis.fractional_age
    items = mixed_items(items_count)
    valuations = {name: Valuation(Curve.from_mapping(mapping), frac, "exact")
                  for name, mapping in STRUCTURES.items()}
    tasks = {}
    for name, valuation in valuations.items():
        # Every structure on the general path (fast=False), on which curves are valued: the
        # figures are what a structure costs over a flat rate on the same machinery. The
        # flat rate's own column path (service.engine.columns, flat rates only) is timed
        # beside them for information.
        tasks[(name, "value")] = lambda v=valuation: value_annuities(tables, items, v,
                                                                     fast=False)
        tasks[(name, "measures")] = lambda v=valuation: _everything(tables, items, v)
    tasks[("flat", "columns")] = lambda: value_annuities(tables, items, valuations["flat"])
    seconds = side_by_side(tasks, repeats)
    med = {key: median(times) for key, times in seconds.items()}
    flat = med[("flat", "value")]

    def paired(top, bottom):
        # Each round times every configuration once, seconds apart: the ratio of a round
        # compares timings taken under the same load; the figure is their median.
        return median([t / b for t, b in zip(seconds[top], seconds[bottom], strict=True)])

    figures, rows = [], []
    for name in STRUCTURES:
        value, both = med[(name, "value")], med[(name, "measures")]
        target = None if name == "flat" else STRUCTURE_TARGET
        f1 = Figure(f"curves: {LABELS[name]}, value / flat rate value", value, "s",
                    floor=flat, ratio=paired((name, "value"), ("flat", "value")),
                    target=target)
        f2 = Figure(f"curves: {LABELS[name]}, value and every measure / value alone", both,
                    "s", floor=value, ratio=paired((name, "measures"), (name, "value")),
                    target=MEASURES_TARGET)
        f3 = Figure(f"curves: {LABELS[name]}, value and every measure / flat rate value", both,
                    "s", floor=flat, ratio=paired((name, "measures"), ("flat", "value")),
                    target=None if name == "flat" else STRUCTURE_TARGET * MEASURES_TARGET)
        figures += [f1, f2, f3]
        rows.append([LABELS[name], f"{value:.3f}", f"{f1.ratio:.2f}",
                     f"{target:g}x: {verdict(f1.met)}" if target else "",
                     f"{both:.3f}", f"{f2.ratio:.2f}",
                     f"{MEASURES_TARGET:g}x: {verdict(f2.met)}", f"{f3.ratio:.2f}",
                     f"{f3.target:g}x: {verdict(f3.met)}" if f3.target else ""])

    columns = Figure("curves: flat rate value on the column path / on the general path",
                     med[("flat", "columns")], "s", floor=flat,
                     ratio=paired(("flat", "columns"), ("flat", "value")))
    figures.append(columns)

    diff = guard(tables, items[:GUARD_ITEMS], frac)
    check = Figure("curves: one-term spot curve against the flat rate, largest relative "
                   "difference of values and measures", diff, "relative",
                   target=GUARD_TOLERANCE)
    figures.append(check)
    failures = [] if check.met else [f"one-term spot curve differs from the flat rate by "
                                     f"{diff:.3g} (tolerance {GUARD_TOLERANCE:g})"]
    shapes = {"monthly whole life": 0, "monthly temporary": 0, "monthly deferred": 0,
              "continuous": 0}
    for it in items:
        p = it.payments
        key = ("continuous" if p.timing == "continuous" else "monthly temporary"
               if p.term is not None else "monthly deferred" if p.deferral else
               "monthly whole life")
        shapes[key] += 1
    lines = [
        environment() + f"; {repeats} rounds, each timing every configuration once in "
        "turn. Seconds: the median over the rounds; ratios: the median of each round's "
        "ratio (timings seconds apart, under the same load).",
        "",
        f"{items_count:,} single-life items under `standard-ultimate` (UDD, exact summation), "
        + ", ".join(f"{v:,} {k}" for k, v in shapes.items())
        + f"; flat rate {FLAT_RATE:.0%}. 'Value' is `value_annuities` on the general path "
        "(`fast=False`), where every structure is valued; 'every measure' is "
        "`value_annuities` with every item's measures in the same pass (duration, convexity and "
        "key-rate durations, as the API computes them; always the general path). At a flat "
        "rate without measures the service values these items on the column path "
        f"(`service.engine.columns`): {med[('flat', 'columns')]:.3f} s, {columns.ratio:.2f} "
        "of the general path's time; the other structures have no column path yet.",
        "",
        *table(["structure", "value (s)", "/ flat", "target", "value + every measure (s)",
                "/ value alone", "target", "/ flat value", "target"], rows),
        "",
        "Seconds of each repeat: " + "; ".join(
            f"{LABELS[n]} {w}: " + ", ".join(f"{t:.3f}" for t in seconds[(n, w)])
            for n in STRUCTURES for w in ("value", "measures")) + ".",
        "",
        f"Guard: a one-term spot curve at {FLAT_RATE:.0%} against the flat rate, on the first "
        f"{min(GUARD_ITEMS, items_count):,} items, values, durations, convexities and key-rate "
        f"durations: largest relative difference {diff:.3g} (tolerance {GUARD_TOLERANCE:g}): "
        f"{'passed' if check.met else '**FAILED**'}.",
    ]
    return Section("Interest structures (issue 9)", lines, figures, failures)
