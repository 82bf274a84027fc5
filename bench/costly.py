"""Costly requests: the slowest accepted request of each kind, its peak memory and its price.

For each kind of item, the largest batch the service accepts is built: one item repeated, at
most MAX_ITEMS (10,000) items and at most MAX_EVALUATION_POINTS (20,000,000) work units, sized
with the work ``value_annuities`` itself charges (its ``max_work`` check, made before anything
is valued: on the column paths what an item costs there, on the general path
``service.engine.batch._work``). Then ``value_annuities`` (with every
measure in the same call for items with measures, as the API asks) is timed, the median of
a few repeats, and its peak memory is measured once with tracemalloc (numpy's buffers
included). Each kind reports seconds, peak MiB and seconds per million work units.

The worst is compared with DEADLINE_SECONDS with every worker busy. Production (deploy/k8s/
deployment.yaml, service/serving/gunicorn.conf.py, service/wsgi.py) runs 4 threaded gunicorn
workers with at most 3 valuations each on a container limited to 2 CPUs: 12 valuations can
share 2 cores, so each gets a sixth of one, and a valuation that takes s seconds alone takes
about 6 s then. The deadline of 30 s therefore allows 5 s alone.

    .venv/bin/python bench/run.py --only costly [--costly-repeats R] [--kinds a,b]
    .venv/bin/python bench/costly.py --profile "spot curve, continuous"   # cProfile one kind
"""

import argparse
import cProfile
import math
import pstats
import subprocess
import sys
import tracemalloc
from dataclasses import dataclass, field
from pathlib import Path

if __package__ in (None, ""):
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from bench.common import (  # noqa: E402
    MIB,
    ROOT,
    Figure,
    Section,
    environment,
    median,
    table,
    timed,
    verdict,
)
from bench.curves import SPOT_30  # noqa: E402
from service import create_app  # noqa: E402
from service.engine.annuity import (  # noqa: E402
    Item,
    Life,
    Payments,
    Valuation,
    value_annuities,
)
from service.engine.batch import _SEGMENT_COST, _measure_work, _prepare, _work  # noqa: E402
from service.engine.curves import Curve  # noqa: E402
from service.engine.errors import WorkLimitError  # noqa: E402

#: Production: deploy/k8s/deployment.yaml (WEB_CONCURRENCY 4, ANNUITY_VALUATIONS_PER_WORKER 3,
#: a CPU limit of 2 and a memory limit of 2Gi for the service container).
WORKERS = 4
VALUATIONS_PER_WORKER = 3
CPUS = 2
MEMORY_LIMIT_MIB = 2048
CONCURRENT = WORKERS * VALUATIONS_PER_WORKER
#: How much longer a valuation takes with every valuation slot busy than alone.
BUSY_FACTOR = CONCURRENT / CPUS
#: The basis: the Illustrative Life Table runs from age 13, the longest windows shipped.
BASIS = "illustrative"
YOUNG = 13.0
#: A kind costing more than this many times a reference unit's cost per unit charged is
#: priced too low.
PRICE_YARDSTICK = 2.0


@dataclass(frozen=True)
class Kind:
    """One kind of item, repeated into the largest batch the service accepts."""

    name: str
    item: Item
    fractional_age: str = "udd"
    approximation: str = "exact"
    spot: bool = False
    measures: bool = False
    #: Which _SEGMENT_COST weight prices it (continuous items).
    weight: tuple[str, int] | None = None
    #: Discrete single-life items at a flat rate: what a work unit (a payment date) is.
    reference: bool = False
    #: The basis (its tables; its interest unless ``spot``); the approximation given above
    #: wins over the basis' own.
    basis: str = BASIS


def _one(timing="advance", frequency=12, guarantee=0.0):
    return (Life(YOUNG),), Payments(timing, frequency, None, 0.0, guarantee, 0.0)


_TWO = (Life(YOUNG), Life(YOUNG + 3))
_CONT = Payments("continuous", 1)
#: Survivorship of the two-life items: the full amount while both or the first live, two
#: thirds to the second after the first dies.
_J2_3 = (1.0, 1.0, 2.0 / 3.0)

KINDS = [
    Kind("single life, monthly, whole life", Item(*_one()), reference=True),
    Kind("single life, weekly, whole life", Item(*_one(frequency=52)), reference=True),
    Kind("single life, daily, whole life", Item(*_one(frequency=365)), reference=True),
    Kind("two lives, monthly, whole life", Item(_TWO, Payments("advance", 12), _J2_3)),
    Kind("continuous, single life, UDD", Item((Life(YOUNG),), _CONT), weight=("udd", 1)),
    Kind("continuous, single life, constant force", Item((Life(YOUNG),), _CONT),
         "constant-force", weight=("constant-force", 1)),
    Kind("continuous, single life, Balducci", Item((Life(YOUNG),), _CONT), "balducci",
         weight=("balducci", 1)),
    Kind("continuous, two lives, UDD", Item(_TWO, _CONT, _J2_3), weight=("udd", 2)),
    Kind("continuous, two lives, constant force", Item(_TWO, _CONT, _J2_3), "constant-force",
         weight=("constant-force", 2)),
    Kind("continuous, two lives, Balducci", Item(_TWO, _CONT, _J2_3), "balducci",
         weight=("balducci", 2)),
    Kind("daily, guaranteed 200 years", Item(*_one(frequency=365, guarantee=200.0))),
    Kind("three-term Woolhouse, monthly", Item(*_one()), approximation="woolhouse-3"),
    # A shipped basis with two-term Woolhouse: reachable through the API as it stands.
    Kind("two-term Woolhouse, monthly, fernhollow-annuitants@2025.1 from 40",
         Item((Life(40.0),), Payments("advance", 12)), approximation="woolhouse-2",
         basis="fernhollow-annuitants@2025.1"),
    Kind("spot curve, monthly", Item(*_one()), spot=True),
    Kind("spot curve, continuous, single life, UDD", Item((Life(YOUNG),), _CONT), spot=True,
         weight=("udd", 1)),
    Kind("spot curve, continuous, two lives, Balducci", Item(_TWO, _CONT, _J2_3), "balducci",
         spot=True, weight=("balducci", 2)),
    Kind("all measures, spot curve, monthly", Item(*_one()), spot=True, measures=True),
    Kind("all measures, spot curve, continuous, single life, constant force",
         Item((Life(YOUNG),), _CONT), "constant-force", spot=True, measures=True,
         weight=("constant-force", 1)),
    Kind("all measures, spot curve, continuous, two lives, Balducci", Item(_TWO, _CONT, _J2_3),
         "balducci", spot=True, measures=True, weight=("balducci", 2)),
    Kind("all measures, flat rate, daily, guaranteed 200 years",
         Item(*_one(frequency=365, guarantee=200.0)), measures=True),
]


@dataclass
class Result:
    kind: Kind
    items: int
    work: int
    bound: str  # what stopped the batch growing: "items" or "work"
    value_seconds: float
    measures_seconds: float
    peak_mib: float
    times: list[float] = field(default_factory=list)
    #: What the general path would charge for the same items (it prices weighted segments
    #: and dates; ``work`` is what the engine charged, on whichever path values them).
    general_work: int = 0

    @property
    def seconds(self) -> float:
        return self.value_seconds + self.measures_seconds

    @property
    def per_million(self) -> float:
        return self.seconds / (self.work / 1e6)


def _valuation(kind: Kind, basis) -> Valuation:
    interest = Curve.from_mapping(SPOT_30) if kind.spot else basis.interest
    return Valuation(interest, kind.fractional_age, kind.approximation)


def _options(kind: Kind, size: int) -> dict:
    """What the API asks of ``value_annuities`` for ``size`` items of ``kind``."""
    return {"measure": [True] * size, "key_rates": True} if kind.measures else {}


def _priced(kind: Kind, tables, items, valuation: Valuation) -> int:
    """The work ``value_annuities`` charges for ``items`` (with their measures for such
    kinds): its own check, made before anything is valued, asked with a cap of 0 units. On
    the column paths an item is charged what it costs there (a single-life item under UDD
    at a flat rate one unit, whatever its term); on the general path every payment date
    or weighted segment (``batch._work``, ``_measure_work``)."""
    try:
        value_annuities(tables, items, valuation, max_work=0, **_options(kind, len(items)))
    except WorkLimitError as exc:
        return exc.work
    raise AssertionError(f"{kind.name}: no work charged")


def _general_priced(kind: Kind, tables, items, valuation: Valuation) -> int:
    """The work the general path prices ``items`` at (what ``_SEGMENT_COST`` weighs)."""
    batch = _prepare(tables, items, valuation)
    if kind.measures and valuation.approximation == "exact":
        return int(_measure_work(batch, valuation.curve).sum())
    if kind.measures:
        return int((_work(batch, valuation.curve) + _measure_work(batch, valuation.curve)).sum())
    return int(_work(batch, valuation.curve).sum())


#: Items in the batch from which a kind's charge per item is read (a batch of a few items is
#: valued in plain floats and charged one unit an item; a large one as columns or on the
#: general path, as the largest batch will be).
_PROBE = 1_000


def largest_batch(kind: Kind, tables, valuation: Valuation, max_items: int, max_work: int):
    """Return (items, work, bound): the largest accepted batch of ``kind.item`` repeated."""
    probe = min(max_items, _PROBE)
    unit = -(-_priced(kind, tables, [kind.item] * probe, valuation) // probe)
    n = max(1, min(max_items, max_work // unit))
    items = [kind.item] * n
    work = _priced(kind, tables, items, valuation)
    # The engine's own check: this batch is accepted, one more item would not be.
    assert work <= max_work, (kind.name, work)
    assert n == max_items or work + unit > max_work, (kind.name, work, unit)
    return items, work, "items" if n == max_items else "work"


def measure(kind: Kind, basis, max_items: int, max_work: int, repeats: int) -> Result:
    tables = basis.tables
    valuation = _valuation(kind, basis)
    items, work, bound = largest_batch(kind, tables, valuation, max_items, max_work)
    # As the API asks: values, and for kinds with measures every measure, in one call.
    options = _options(kind, len(items))

    def value():
        value_annuities(tables, items, valuation, max_work=max_work, **options)

    value_times, measure_times = [], []
    for _ in range(repeats):
        value_times.append(timed(value))
    tracemalloc.start()
    try:
        value()
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    totals = [v + m for v, m in zip(value_times, measure_times or [0.0] * repeats, strict=True)]
    general_work = _general_priced(kind, tables, items, valuation)
    return Result(kind, len(items), work, bound, median(value_times),
                  median(measure_times) if measure_times else 0.0, peak / MIB, totals,
                  general_work)


def general_date_cost(kind: Kind, basis, max_items: int, max_work: int, repeats: int) -> float:
    """Seconds per million units of ``kind``'s largest batch valued on the general path
    (``fast=False``), priced as the general path prices it: what one payment date costs
    there, the unit ``_SEGMENT_COST`` weighs segments against."""
    tables = basis.tables
    valuation = _valuation(kind, basis)
    items, _, _ = largest_batch(kind, tables, valuation, max_items, max_work)
    seconds = median([timed(lambda: value_annuities(tables, items, valuation, fast=False,
                                                    max_work=max_work))
                      for _ in range(repeats)])
    return seconds / (_general_priced(kind, tables, items, valuation) / 1e6)


def worker_baseline_mib() -> float:
    """Resident MiB of a fresh process once the app has loaded the bases (what a worker
    holds before any request), measured in a subprocess."""
    code = ("from service import create_app; from bench.common import resident_mib; "
            "create_app(); print(resident_mib())")
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True,
                         text=True, check=True)
    return float(out.stdout.split()[-1])


def implied_cap(results: list[Result], budget: float, max_items: int) -> tuple[float, str]:
    """Return the largest work cap under which every kind's slowest accepted request takes at
    most ``budget`` seconds alone, given each kind's measured seconds per unit, and the kind
    that sets it (``inf`` if none binds: the item limit keeps every kind within budget)."""
    cap, who = math.inf, ""
    for r in results:
        rate = r.seconds / r.work
        most = max_items * (r.work / r.items)  # the work of MAX_ITEMS items of this kind
        if rate * most > budget and budget / rate < cap:
            cap, who = budget / rate, r.kind.name
    return cap, who


def run(repeats: int = 3, only: list[str] | None = None) -> Section:
    app = create_app()
    registry = app.extensions["registry"]
    basis = registry.resolve(BASIS)
    max_items = app.config["MAX_ITEMS"]
    max_work = app.config["MAX_EVALUATION_POINTS"]
    deadline = app.config["DEADLINE_SECONDS"]
    baseline = worker_baseline_mib()
    budget = deadline / BUSY_FACTOR
    memory_budget = (MEMORY_LIMIT_MIB - WORKERS * baseline) / CONCURRENT
    kinds = [k for k in KINDS if not only or k.name in only]
    results = []
    for kind in kinds:
        results.append(measure(kind, registry.resolve(kind.basis), max_items, max_work,
                               repeats))
        r = results[-1]
        print(f"  {kind.name}: {r.items:,} items, {r.work:,} units, {r.seconds:.2f} s, "
              f"{r.peak_mib:.0f} MiB", file=sys.stderr, flush=True)

    references = [r.per_million for r in results if r.kind.reference]
    unit_cost = median(references) if references else median([r.per_million for r in results])
    priced = list(results)
    worst = max(results, key=lambda r: r.seconds)
    worst_priced = max(priced, key=lambda r: r.seconds) if priced else worst
    cap, cap_kind = implied_cap(priced, budget, max_items)
    value_cap, value_cap_kind = implied_cap([r for r in priced if not r.kind.measures], budget,
                                            max_items)

    figures, rows = [], []
    for r in results:
        extrapolated = ""
        name = r.kind.name + extrapolated
        t = Figure(f"costly: {name}: seconds alone / share of the deadline with every worker "
                   f"busy", r.seconds, "s", floor=budget, target=1.0)
        m = Figure(f"costly: {name}: peak MiB / memory per valuation with every worker busy",
                   r.peak_mib, "MiB", floor=memory_budget, target=1.0)
        u = Figure(f"costly: {name}: seconds per million work units charged / a reference "
                   f"unit's", r.per_million, "s per million units", floor=unit_cost,
                   target=PRICE_YARDSTICK)
        figures += [t, m, u]
        rows.append([name, f"{r.items:,}", f"{r.work / 1e6:.2f}M ({r.bound})",
                     f"{r.value_seconds:.2f}",
                     "in the value" if r.kind.measures else "",
                     f"{r.seconds:.2f}", f"{r.seconds * BUSY_FACTOR:.1f}", verdict(t.met),
                     f"{r.peak_mib:.0f}", verdict(m.met), f"{r.per_million:.3f}",
                     f"{u.ratio:.2f}"])
    busy = Figure("costly: worst accepted request, seconds with every worker busy / deadline "
                  f"({worst.kind.name})", worst.seconds * BUSY_FACTOR, "s", floor=deadline,
                  target=1.0)
    busy_priced = Figure("costly: worst accepted request priced by its work, seconds with every "
                         f"worker busy / deadline ({worst_priced.kind.name})",
                         worst_priced.seconds * BUSY_FACTOR, "s", floor=deadline, target=1.0)
    figures += [busy, busy_priced]
    cap_figure = Figure("costly: work cap under which every kind priced by its work meets the "
                        "deadline with every worker busy / MAX_EVALUATION_POINTS",
                        cap if math.isfinite(cap) else float(max_work), "work units",
                        floor=max_work, target=None)
    figures.append(cap_figure)
    figures.append(Figure("costly: work cap under which every kind without measures meets the "
                          "deadline with every worker busy / MAX_EVALUATION_POINTS",
                          value_cap if math.isfinite(value_cap) else float(max_work),
                          "work units", floor=max_work, target=None))

    # The segment weights price the general path: kinds it values (charged as it prices
    # them) against what a payment date costs there.
    general = [r for r in results if r.kind.weight and not r.kind.measures and not r.kind.spot
               and r.work == r.general_work]
    weights = []
    if general:
        reference = next(k for k in KINDS if k.reference)
        date_cost = general_date_cost(reference, registry.resolve(reference.basis),
                                      max_items, max_work, repeats)
        for r in general:
            current = _SEGMENT_COST[r.kind.weight]
            implied = current * r.per_million / date_cost
            weights.append([r.kind.name, f"{r.kind.weight}", f"{current}",
                            f"{r.per_million / date_cost:.2f}", f"{implied:.1f}"])

    def cap_text(cap, who):
        if math.isfinite(cap):
            return f"{cap / 1e6:.1f} million units (set by {who})"
        return "no cap binds (the item limit keeps every kind within budget)"
    lines = [
        environment() + f"; median of {repeats} repeats.",
        "",
        f"Basis `{BASIS}` (ages from {YOUNG:g}) unless a kind names another; flat rate "
        f"{basis.interest.rates[0]:.0%} or "
        "the 30-term spot curve of the interest-structure section. Each batch is one item "
        f"repeated, the most the service accepts: at most {max_items:,} items and "
        f"{max_work:,} work units (which of the two bound it is in brackets). Seconds are one "
        "core alone: `value_annuities`, with every measure in the same call for kinds "
        "with measures (the API runs both, each within the cap). 'Busy' multiplies by "
        f"{BUSY_FACTOR:g}: production runs {WORKERS} threaded workers with at most "
        f"{VALUATIONS_PER_WORKER} valuations each on {CPUS} CPUs ({CONCURRENT} valuations on "
        f"{CPUS} cores), so a valuation's share of the {deadline:g} s deadline is "
        f"{budget:g} s alone. Memory: tracemalloc peak of the engine's allocations (the "
        "request's JSON is extra); the budget per valuation is the container's "
        f"{MEMORY_LIMIT_MIB} MiB less {WORKERS} workers of {baseline:.0f} MiB resident (this "
        f"process after loading the bases), shared by {CONCURRENT} valuations: "
        f"{memory_budget:.0f} MiB. Work: the units `value_annuities` charges (its own "
        "check, asked with a cap of 0): on the column paths what an item costs there (a "
        "single-life item under UDD at a flat rate one unit, whatever its term), on the "
        "general path every payment date or weighted segment. Per unit: seconds per million "
        "units charged, and that over the median of the single-life discrete kinds at a flat "
        f"rate ({unit_cost:.3f} s, what a reference unit costs): above {PRICE_YARDSTICK:g} a "
        "kind would be charged too little for what it costs.",
        "",
        *table(["kind", "items", "work", "value (s)", "measures (s)", "alone (s)",
                f"busy (s, x{BUSY_FACTOR:g})", f"within {deadline:g} s", "peak MiB",
                f"within {memory_budget:.0f} MiB", "s per M units", "/ a reference unit's"],
               rows),
        "",
        f"Worst accepted request: {worst.kind.name}, {worst.seconds:.2f} s alone, about "
        f"{worst.seconds * BUSY_FACTOR:.0f} s with every worker busy against the "
        f"{deadline:g} s deadline: {verdict(busy.met)}."
        + (f" Worst among kinds whose work prices their cost: {worst_priced.kind.name}, "
           f"{worst_priced.seconds:.2f} s alone, about "
           f"{worst_priced.seconds * BUSY_FACTOR:.0f} s busy: {verdict(busy_priced.met)}."
           if worst_priced is not worst else ""),
        "",
        f"Cap implied by these figures (every kind priced by its work within {budget:g} s "
        f"alone): {cap_text(cap, cap_kind)}; counting only kinds without measures: "
        f"{cap_text(value_cap, value_cap_kind)}. The cap is {max_work / 1e6:g} million.",
    ]
    if weights:
        lines += ["", "Continuous segment weights (`_SEGMENT_COST`) of the kinds the general "
                      "path values, against what a payment date costs there (the first "
                      "reference kind valued with `fast=False`), value only:", "",
                  *table(["kind", "weight key", "weight", "cost per unit / a date's",
                          "weight that would price it"], weights)]
    return Section("Costly requests (issue 8)", lines, figures)


def profile(name: str) -> None:
    """Print where the time of one kind's slowest accepted request goes (cProfile)."""
    app = create_app()
    (kind,) = [k for k in KINDS if k.name == name]
    basis = app.extensions["registry"].resolve(kind.basis)
    valuation = _valuation(kind, basis)
    items, work, _ = largest_batch(kind, basis.tables, valuation, app.config["MAX_ITEMS"],
                                   app.config["MAX_EVALUATION_POINTS"])
    options = _options(kind, len(items))
    profiler = cProfile.Profile()
    profiler.enable()
    value_annuities(basis.tables, items, valuation, **options)
    profiler.disable()
    print(f"{name}: {len(items):,} items, {work:,} work units")
    pstats.Stats(profiler).sort_stats("tottime").print_stats(15)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--profile", metavar="KIND", choices=[k.name for k in KINDS],
                        help="profile one kind's slowest accepted request instead")
    args = parser.parse_args()
    if args.profile:
        profile(args.profile)
        return 0
    print(run().markdown())
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
