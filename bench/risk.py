"""Insurance factors and the spread of the present value, against the matching annuities.

The project's targets (issue 13): insurance factors for 10,000 items cost at most 1.5x the
matching annuity factors, and a spread request at most 3x. Each pair is timed side by side
in one run (round robin), median of the repeats; the ratio is the median of each round's
ratio. Items: 10,000 single lives aged 50 to 80 (fixed seed) under `standard-ultimate`.
"""

import numpy as np

from bench.common import Figure, Section, median, side_by_side, table, verdict
from service import create_app
from service.engine.annuity import Item, Life, Payments, Valuation, value_annuities
from service.engine.insurance import Assurance, Cover, insurance_values
from service.engine.projection import project
from service.engine.spread import annuity_spread

INSURANCE_TARGET = 1.5
SPREAD_TARGET = 3.0
PROJECTION_TARGET = 3.0  # issue 12: a 10,000-item projection against the same items' factors
#: (label, annuity payments, insurance benefit timing and periods a year)
PAIRS = (("end of year / annual in advance", Payments("advance", 1), "end-of-year", 1),
         ("end of month / monthly in advance", Payments("advance", 12), "end-of-period", 12),
         ("moment of death / continuous", Payments("continuous"), "moment-of-death", 1))


def run(items_count: int = 10_000, repeats: int = 5) -> Section:
    basis = create_app().extensions["registry"].resolve("standard-ultimate")
    tables = basis.tables
    valuation = Valuation(0.04, basis.fractional_age)
    ages = np.random.default_rng(13).uniform(50, 80, items_count)
    tasks = {}
    for label, payments, timing, m in PAIRS:
        annuities = [Item((Life(float(a)),), payments) for a in ages]
        covers = [Assurance((Life(float(a)),), Cover(benefit_timing=timing, frequency=m))
                  for a in ages]
        # Annuity factors on the general path (fast=False), the machinery insurance factors,
        # the spread and projections are built on; the column path, for information below.
        tasks[(label, "annuity")] = lambda x=annuities: value_annuities(tables, x, valuation,
                                                                        fast=False)
        tasks[(label, "columns")] = lambda x=annuities: value_annuities(tables, x, valuation)
        tasks[(label, "insurance")] = lambda x=covers: insurance_values(tables, x, valuation)
    monthly = [Item((Life(float(a)),), Payments("advance", 12)) for a in ages]
    levels = [[5, 25, 50, 75, 95]] * len(monthly)
    tasks[("spread", "annuity")] = lambda: value_annuities(tables, monthly, valuation,
                                                           fast=False)
    tasks[("spread", "spread")] = lambda: annuity_spread(tables, monthly, valuation, levels)
    amounts = np.full(len(monthly), 12_000.0)
    tasks[("projection", "projection")] = lambda: project(tables, monthly, amounts, valuation,
                                                          "monthly")
    seconds = side_by_side(tasks, repeats)

    def paired(top, bottom):
        return median([t / b for t, b in zip(seconds[top], seconds[bottom], strict=True)])

    figures, rows = [], []
    for label, *_ in PAIRS:
        f = Figure(f"risk: insurance / annuity factors, {label}",
                   median(seconds[(label, "insurance")]), "s",
                   floor=median(seconds[(label, "annuity")]),
                   ratio=paired((label, "insurance"), (label, "annuity")),
                   target=INSURANCE_TARGET)
        figures.append(f)
        rows.append([label, f"{f.floor:.3f}", f"{median(seconds[(label, 'columns')]):.3f}",
                     f"{f.value:.3f}", f"{f.ratio:.2f}",
                     f"{INSURANCE_TARGET:g}x: {verdict(f.met)}"])
    f = Figure("risk: spread (5 percentiles and the standard deviation) / annuity factors, "
               "monthly in advance", median(seconds[("spread", "spread")]), "s",
               floor=median(seconds[("spread", "annuity")]),
               ratio=paired(("spread", "spread"), ("spread", "annuity")), target=SPREAD_TARGET)
    figures.append(f)
    rows.append(["spread, monthly in advance", f"{f.floor:.3f}", "", f"{f.value:.3f}",
                 f"{f.ratio:.2f}", f"{SPREAD_TARGET:g}x: {verdict(f.met)}"])
    f = Figure("risk: portfolio projection by month / annuity factors, monthly in advance",
               median(seconds[("projection", "projection")]), "s",
               floor=median(seconds[("spread", "annuity")]),
               ratio=paired(("projection", "projection"), ("spread", "annuity")),
               target=PROJECTION_TARGET)
    figures.append(f)
    rows.append(["portfolio projection by month (issue 12)", f"{f.floor:.3f}", "",
                 f"{f.value:.3f}",
                 f"{f.ratio:.2f}", f"{PROJECTION_TARGET:g}x: {verdict(f.met)}"])
    lines = [f"{items_count:,} single lives aged 50 to 80 under `standard-ultimate` (UDD) at "
             f"4%; {repeats} rounds, each timing every configuration once in turn. Insurance "
             "factors include their second moments. 'Annuity' is `value_annuities` on the "
             "general path (`fast=False`), the machinery the insurance factors, the spread "
             "and projections are built on; 'on columns' is the same annuity factors as the "
             "service values them (`service.engine.columns`; those three have no column path "
             "yet).", "",
             *table(["pair", "annuity (s)", "annuity on columns (s)",
                     "insurance, spread or projection (s)", "ratio", "target"],
                    rows), ""]
    return Section("Insurance factors, spread (issue 13) and projections (issue 12)", lines,
                   figures)
