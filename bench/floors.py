"""Floors: the engine against what it cannot beat, and against the obvious way.

Figures (issue 11; targets live here, never in tests):

1. the engine against a plain per-item pure-Python sum (bench/reference.py) on 2,000 mixed
   single-life items with every option: at least 100x faster (engine / reference <= 0.01);
   a guard, not a timing: the engine agrees with the reference to 1e-10 relative on every
   one of those items under each fractional-age assumption (the run fails if not);
2. the engine on 1,000,000 single-life items given as columns: at most 50x a floor that
   evaluates in numpy the annuity-certain of each item's window; peak memory (tracemalloc)
   at most 1 KB per item. Where one call would take more than ``LARGE_BUDGET`` seconds the
   largest size that fits is run instead and the figure says so;
3. the engine's fixed cost for one item: at most 20x the same floor for one item;
6. two lives, and continuous payments: each at most 3x the single-life annual time per item
   (batches of 10,000), each through the same interface as the single-life annual ones
   (columns where they exist) and guarded: it agrees with the general path to 1e-12
   relative on the figure's items (the run fails if not). Two lives as Item objects are
   timed too, for information.

(4 and 5, the HTTP figures, are bench/http.py's.) Engine against floor: side by side in one
run (round robin), the engine's median against the floor's minimum. Engine against engine
(figure 6): the median of each round's ratio.

The engine is ``service.engine.columns.value_columns`` on columns where that module exists,
else ``value_annuities`` on Item objects built from the same columns (outside the timing);
the results say which. Where both exist, they must agree to 1e-12 relative (a guard).

    .venv/bin/python -m bench.run --only floors           # printed, results left alone
    .venv/bin/python -m bench.floors --plots /tmp/floors  # the same, and the PNG plots
    .venv/bin/python -m bench.floors --profile            # pyinstrument, 10,000 items
"""

import argparse
import math
import sys
import time
import tracemalloc
from dataclasses import dataclass
from pathlib import Path

import numpy as np

if __package__ in (None, ""):
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from bench import reference  # noqa: E402
from bench.common import (  # noqa: E402
    Figure,
    Section,
    environment,
    median,
    side_by_side,
    table,
    timed,
    verdict,
)
from service import create_app  # noqa: E402
from service.engine.annuity import Item, Life, Payments, Valuation, value_annuities  # noqa: E402

try:  # the columnar engine, where it has landed
    from service.engine import columns as _columns  # noqa: E402
except ImportError:
    _columns = None
try:  # two-life items as columns, where they have landed
    from service.engine.joint_columns import JointColumns as _JointColumns  # noqa: E402
except ImportError:
    _JointColumns = None

#: Both sexes, a one-year select period, ages 40 to 120, UDD, 4%.
BASIS = "fernhollow-annuitants@2026.1"
#: For the term sweep (ages 20 to 130: a 100-year term from age 20 fits).
LONG_BASIS = "standard-ultimate"
REFERENCE_TARGET = 0.01  # engine / reference: at least 100x faster
LARGE_TARGET = 50.0
MEMORY_TARGET = 1024.0  # bytes per item
ONE_TARGET = 20.0
SHAPE_TARGET = 3.0
AGREEMENT = 1e-10
COLUMNS_AGREEMENT = 1e-12
MIXED = 2_000
LARGE = 1_000_000
BATCH = 10_000
#: Seconds one engine call on the large batch may take; beyond, a smaller batch is run.
LARGE_BUDGET = 12.0
#: Calls per timing of one item (the time of one call is a fraction of a millisecond).
ONE_CALLS = 200
ASSUMPTIONS = ("udd", "constant-force", "balducci")
FIELDS = ("table", "age", "duration", "age_adjustment", "mortality_multiplier", "flat_extra",
          "timing", "frequency", "term", "deferral", "guarantee", "escalation")
SWEEP_SIZES = (1, 10, 100, 1_000, 10_000, 100_000, 1_000_000)
SWEEP_TERMS = (1, 2, 3, 5, 10, 15, 20, 30, 40, 50, 60, 70, 80, 90, 100)
SWEEP_TERM_ITEMS = 1_000


# ---------------------------------------------------------------------------------------------
# Items as columns


def take(cols: dict, rows) -> dict:
    """Return the rows ``rows`` (a slice or an index array) of every column."""
    return {k: v[rows] for k, v in cols.items()}


def mixed_columns(n: int, seed: int = 11) -> dict:
    """``n`` single-life items with every option: both sexes; exact ages 46 to 90, some
    adjusted; select (duration 0), explicitly ultimate (1, 3) or ultimate; multipliers and
    flat extras; in advance or in arrears, 1, 2, 4 or 12 times a year; whole life, temporary
    (a whole number of periods up to 30 years) or deferred (up to 20 years); some guaranteed
    5 or 10 years (at most the term); some escalating."""
    rng = np.random.default_rng(seed)
    m = rng.choice([1, 2, 4, 12], n)
    shape = rng.choice(3, n)
    part = rng.integers(0, 12, n) % m  # periods beyond the whole years
    term = np.where(shape == 1, (rng.integers(1, 31, n) * m + part) / m, np.inf)
    deferral = np.where(shape == 2, (rng.integers(1, 21, n) * m + part) / m, 0.0)
    guarantee = rng.choice([0.0, 0.0, 5.0, 10.0], n)
    guarantee = np.where(np.isfinite(term), np.minimum(guarantee, np.floor(term)), guarantee)
    return {
        "table": rng.integers(0, 2, n),
        "age": rng.uniform(46, 90, n),
        "duration": rng.choice([np.nan, np.nan, 0.0, 1.0, 3.0], n),
        "age_adjustment": rng.choice([0.0, 0.0, 0.0, -2.5, 3.0], n),
        "mortality_multiplier": rng.choice([1.0, 1.0, 0.75, 1.4], n),
        "flat_extra": rng.choice([0.0, 0.0, 0.0, 0.003], n),
        "timing": rng.choice(np.array(["advance", "arrears"]), n),
        "frequency": m,
        "term": term,
        "deferral": deferral,
        "guarantee": guarantee,
        "escalation": rng.choice([0.0, 0.0, 0.02, 0.035], n),
    }


def large_columns(n: int, seed: int = 12) -> dict:
    """``n`` single-life items in advance: 40% whole life, 30% temporary (5 to 30 years),
    30% deferred (1 to 20 years, ages 45 to 64); half annual, half monthly; exact ages; both
    sexes; multipliers 1, 0.85 and 1.2; a fifth select (duration 0), a fifth explicitly
    ultimate (duration 2)."""
    rng = np.random.default_rng(seed)
    shape = rng.choice(3, n, p=[0.4, 0.3, 0.3])
    age = np.where(shape == 2, rng.uniform(45, 64, n), rng.uniform(55, 90, n))
    return {
        "table": rng.integers(0, 2, n),
        "age": age,
        "duration": rng.choice([np.nan, np.nan, np.nan, 0.0, 2.0], n),
        "age_adjustment": np.zeros(n),
        "mortality_multiplier": rng.choice([1.0, 1.0, 0.85, 1.2], n),
        "flat_extra": np.zeros(n),
        "timing": np.full(n, "advance"),
        "frequency": rng.choice([1, 12], n),
        "term": np.where(shape == 1, rng.integers(5, 31, n).astype(float), np.inf),
        "deferral": np.where(shape == 2, rng.integers(1, 21, n).astype(float), 0.0),
        "guarantee": np.zeros(n),
        "escalation": np.zeros(n),
    }


def simple_columns(ages, tables, timing: str, frequency: int, term=np.inf) -> dict:
    """Plain single-life items: whole life (or ``term`` years), no adjustment."""
    n = len(ages)
    return {"table": np.asarray(tables), "age": np.asarray(ages, dtype=float),
            "duration": np.full(n, np.nan), "age_adjustment": np.zeros(n),
            "mortality_multiplier": np.ones(n), "flat_extra": np.zeros(n),
            "timing": np.full(n, timing), "frequency": np.full(n, frequency),
            "term": np.full(n, float(term)), "deferral": np.zeros(n),
            "guarantee": np.zeros(n), "escalation": np.zeros(n)}


def to_items(cols: dict) -> list[Item]:
    """The same items as engine Item objects."""
    items = []
    for (tab, age, dur, adj, mult, extra, timing, m, term, u, g, e) in zip(
            *(cols[f].tolist() for f in FIELDS), strict=True):
        life = Life(age, int(tab), None if math.isnan(dur) else int(dur), adj, mult, extra)
        items.append(Item((life,), Payments(timing, int(m), None if math.isinf(term) else term,
                                            u, g, e)))
    return items


def to_reference(cols: dict) -> list[reference.RefItem]:
    """The same items for the reference."""
    return [reference.RefItem(int(tab), age, None if math.isnan(dur) else int(dur), adj, mult,
                              extra, timing, int(m), None if math.isinf(term) else term, u, g, e)
            for (tab, age, dur, adj, mult, extra, timing, m, term, u, g, e)
            in zip(*(cols[f].tolist() for f in FIELDS), strict=True)]


def certain_floor(cols: dict, rate: float, last_ages: np.ndarray) -> np.ndarray:
    """The floor: in numpy, the annuity-certain of each item's window, v^u (1 - v^n) / d^(m)
    (times v^(1/m) in arrears), n the term or, for life, the years from the deferral to the
    end of the table."""
    delta = math.log1p(rate)
    m = cols["frequency"]
    u = cols["deferral"]
    to_end = last_ages[cols["table"]] + 1.0 - cols["age"] - cols["age_adjustment"] - u
    n = np.minimum(cols["term"], np.maximum(to_end, 0.0))
    value = np.exp(-delta * u) * -np.expm1(-delta * n) / (m * -np.expm1(-delta / m))
    return np.where(cols["timing"] == "arrears", value * np.exp(-delta / m), value)


# ---------------------------------------------------------------------------------------------
# The engine, through whichever interface exists


def _make_columns(cols: dict):
    """Build the columnar engine's Columns from a dict of arrays."""
    kind = _columns.Columns
    for name in ("from_dict", "from_arrays", "from_mapping"):
        if hasattr(kind, name):
            return getattr(kind, name)(cols)
    return kind(**cols)


@dataclass
class Engine:
    """The engine on one basis: ``prepare`` turns columns into its input (outside any
    timing), ``value`` values them."""

    tables: tuple
    valuation: Valuation
    api: str  # "value_columns" or "value_annuities"

    def prepare(self, cols: dict):
        return _make_columns(cols) if self.api == "value_columns" else to_items(cols)

    def value(self, prepared) -> np.ndarray:
        if self.api == "value_columns":
            return np.asarray(_columns.value_columns(self.tables, prepared,
                                                     self.valuation).value)
        return value_annuities(self.tables, prepared, self.valuation).value


def choose_engine(tables, valuation: Valuation, probe: dict) -> tuple[Engine, str, float]:
    """Return the engine to time, why, and (where both interfaces ran) the largest relative
    difference between them on ``probe`` (NaN otherwise)."""
    items = Engine(tables, valuation, "value_annuities")
    if _columns is None:
        return items, "`service.engine.columns` is not present", math.nan
    columns = Engine(tables, valuation, "value_columns")
    try:
        got = columns.value(columns.prepare(probe))
    except Exception as error:  # an interface other than the one this suite expects
        return items, (f"`service.engine.columns` is present but could not be called as "
                       f"expected ({type(error).__name__}: {error})"), math.nan
    want = items.value(items.prepare(probe))
    return columns, "`service.engine.columns` is present", relative_difference(got, want)


def relative_difference(got, want) -> float:
    """The largest |got - want| / |want| (inf where want is 0 and got is not)."""
    got, want = np.asarray(got, dtype=float), np.asarray(want, dtype=float)
    diff = np.abs(got - want)
    with np.errstate(divide="ignore", invalid="ignore"):
        rel = np.where(diff == 0, 0.0, diff / np.abs(want))
    return float(np.nan_to_num(rel, nan=np.inf).max(initial=0.0))


def _basis(registry, ref: str):
    basis = registry.resolve(ref)
    return basis, Valuation(basis.interest_rate, basis.fractional_age, basis.approximation)


def _per_call(fn, calls: int):
    def run():
        for _ in range(calls):
            fn()
    return run


def _nice_size(limit: float) -> int:
    """The largest 1, 2 or 5 x 10^k not above ``limit`` (at least 1,000)."""
    best = 1_000
    for k in range(3, 7):
        for lead in (1, 2, 5):
            if lead * 10**k <= limit:
                best = lead * 10**k
    return best


# ---------------------------------------------------------------------------------------------
# The suite


def _against_general(what: str, got, tables, items, valuation, failures: list) -> float:
    """The largest relative difference of ``got`` from the general path's values of
    ``items``; beyond COLUMNS_AGREEMENT a failure naming ``what`` is added."""
    between = relative_difference(
        got, value_annuities(tables, items, valuation, fast=False).value)
    if not between <= COLUMNS_AGREEMENT:
        failures.append(f"{what}: the engine differs from the general path by {between:.3g} "
                        f"(tolerance {COLUMNS_AGREEMENT:g})")
    return between


def run(repeats: int = 5, plots: Path | None = None, large: int = LARGE) -> Section:
    registry = create_app().extensions["registry"]
    basis, valuation = _basis(registry, BASIS)
    tables, rate, frac = basis.tables, basis.interest_rate, basis.fractional_age
    last_ages = np.array([t.last_age for t in tables], dtype=float)
    failures: list[str] = []
    figures: list[Figure] = []

    # 1. Engine against the pure-Python reference, and the guard.
    mixed = mixed_columns(MIXED)
    engine, why, between = choose_engine(tables, valuation, mixed)
    if engine.api == "value_columns" and not between <= COLUMNS_AGREEMENT:
        failures.append(f"value_columns differs from value_annuities by {between:.3g} "
                        f"(tolerance {COLUMNS_AGREEMENT:g})")
    ref_tables = [reference.RefTable.of(t) for t in tables]
    ref_items = to_reference(mixed)
    agreement = {}
    for assumption in ASSUMPTIONS:
        other = Engine(tables, Valuation(rate, assumption), engine.api)
        want = reference.values(ref_tables, ref_items, rate, assumption)
        agreement[assumption] = relative_difference(other.value(other.prepare(mixed)), want)
    worst = max(agreement.values())
    guard = Figure("floors: engine against the pure-Python reference, 2,000 mixed items, "
                   "largest relative difference (UDD, constant force, Balducci)", worst,
                   "relative", target=AGREEMENT)
    if not guard.met:
        failures.append(f"the engine differs from the reference by {worst:.3g} (tolerance "
                        f"{AGREEMENT:g}): " + ", ".join(f"{k} {v:.3g}"
                                                         for k, v in agreement.items()))
    prepared_mixed = engine.prepare(mixed)
    s1 = side_by_side({"engine": lambda: engine.value(prepared_mixed),
                       "reference": lambda: reference.values(ref_tables, ref_items, rate,
                                                             frac)}, repeats)
    f1 = Figure(f"floors: engine / pure-Python reference, {MIXED:,} mixed single-life items",
                median(s1["engine"]), "s", floor=min(s1["reference"]), target=REFERENCE_TARGET)

    # 2. The large batch against the annuity-certain floor, and its memory.
    big = large_columns(large)
    probe = take(big, slice(0, 20_000))
    probe_prepared = engine.prepare(probe)
    probe_seconds = min(timed(lambda: engine.value(probe_prepared)) for _ in range(2))
    predicted = probe_seconds * large / 20_000
    n = large if predicted <= LARGE_BUDGET else _nice_size(LARGE_BUDGET / probe_seconds * 20_000)
    cols = take(big, slice(0, n))
    started = time.perf_counter()
    prepared = engine.prepare(cols)
    prepare_seconds = time.perf_counter() - started
    s2 = side_by_side({"engine": lambda: engine.value(prepared),
                       "floor": lambda: certain_floor(cols, rate, last_ages)}, repeats)
    f2 = Figure(f"floors: engine / numpy annuity-certain floor, {n:,} single-life items"
                + ("" if n == large else f" (not {large:,}: see the text)"),
                median(s2["engine"]), "s", floor=min(s2["floor"]), target=LARGE_TARGET)
    tracemalloc.start()
    engine.value(prepared)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    f2m = Figure(f"floors: engine peak memory per item, {n:,} single-life items", peak / n,
                 "bytes", target=MEMORY_TARGET)

    # 3. One item.
    one = simple_columns([65.5], [1], "advance", 1, term=10.0)
    one_prepared = engine.prepare(one)
    s3 = side_by_side({"engine": _per_call(lambda: engine.value(one_prepared), ONE_CALLS),
                       "floor": _per_call(lambda: certain_floor(one, rate, last_ages),
                                          ONE_CALLS)}, repeats)
    s3 = {k: [t / ONE_CALLS for t in v] for k, v in s3.items()}
    f3 = Figure("floors: engine / numpy annuity-certain floor, one item", median(s3["engine"]),
                "s", floor=min(s3["floor"]), target=ONE_TARGET)

    # 6. Two lives and continuous payments against single-life annual.
    rng = np.random.default_rng(16)
    ages = rng.uniform(55, 85, BATCH)
    sexes = rng.integers(0, 2, BATCH)
    annual = engine.prepare(simple_columns(ages, sexes, "advance", 1))
    # Continuous payments through the same interface as the annual ones (columns where they
    # exist), guarded against the general path (segment by segment).
    continuous_cols = simple_columns(ages, sexes, "continuous", 1)
    continuous = engine.prepare(continuous_cols)
    continuous_items = to_items(continuous_cols)
    continuous_between = _against_general(
        "continuous payments", engine.value(continuous), tables, continuous_items, valuation,
        failures)
    partner = np.clip(ages + rng.uniform(-5, 5, BATCH), 40, 110)
    pairs = [Item((Life(float(a), int(s)), Life(float(b), 1 - int(s))), Payments("advance", 1))
             for a, b, s in zip(ages, partner, sexes, strict=True)]
    tasks6 = {"annual": lambda: engine.value(annual),
              "two lives": lambda: value_annuities(tables, pairs, valuation),
              "continuous": lambda: engine.value(continuous)}
    # Two lives through the same interface as the annual ones where two-life columns exist
    # (the second life's columns beside the first's; last survivor, the default), guarded
    # against the general path; the Item-object route is kept as a figure for information.
    pair_columns = None
    if engine.api == "value_columns" and _JointColumns is not None:
        pair_columns = _JointColumns.from_dict(simple_columns(ages, sexes, "advance", 1)
                                               | {"table2": 1 - sexes, "age2": partner})
        pairs_between = _against_general("two lives as columns", engine.value(pair_columns),
                                         tables, pairs, valuation, failures)
        tasks6["two lives"] = lambda: engine.value(pair_columns)
        tasks6["two lives, Item objects"] = lambda: value_annuities(tables, pairs, valuation)
    items_annual = None
    if engine.api != "value_annuities":
        items_annual = to_items(simple_columns(ages, sexes, "advance", 1))
        tasks6["annual, value_annuities"] = lambda: value_annuities(tables, items_annual,
                                                                    valuation)
        tasks6["continuous, value_annuities"] = lambda: value_annuities(
            tables, continuous_items, valuation)
    s6 = side_by_side(tasks6, repeats)

    def paired(top, bottom):
        return median([t / b for t, b in zip(s6[top], s6[bottom], strict=True)])

    f6 = [Figure(f"floors: {what}, per item / single-life annual, batches of {BATCH:,}",
                 median(s6[what]) / BATCH, "s per item", floor=median(s6["annual"]) / BATCH,
                 ratio=paired(what, "annual"), target=SHAPE_TARGET)
          for what in ("two lives", "continuous")]
    if pair_columns is not None:
        f6.append(Figure(f"floors: two lives as Item objects through value_annuities / "
                         f"single-life annual, batches of {BATCH:,}",
                         median(s6["two lives, Item objects"]) / BATCH, "s per item",
                         floor=median(s6["annual"]) / BATCH,
                         ratio=paired("two lives, Item objects", "annual")))
    if items_annual is not None:
        both = "two lives, Item objects" if pair_columns is not None else "two lives"
        f6.append(Figure(f"floors: two lives / single-life annual, both through "
                         f"value_annuities, batches of {BATCH:,}",
                         median(s6[both]) / BATCH, "s per item",
                         floor=median(s6["annual, value_annuities"]) / BATCH,
                         ratio=paired(both, "annual, value_annuities")))
        f6.append(Figure(f"floors: continuous / single-life annual, both through "
                         f"value_annuities (Item objects), batches of {BATCH:,}",
                         median(s6["continuous, value_annuities"]) / BATCH, "s per item",
                         floor=median(s6["annual, value_annuities"]) / BATCH,
                         ratio=paired("continuous, value_annuities",
                                      "annual, value_annuities")))
    figures += [f1, guard, f2, f2m, f3, *f6]

    # Sweeps for the plots: time against items, and against a monthly term.
    by_size = _sweep_sizes(engine, big, rate, last_ages, n, median(s2["engine"]),
                           min(s2["floor"]))
    long_basis, long_valuation = _basis(registry, LONG_BASIS)
    long_engine = Engine(long_basis.tables, long_valuation, engine.api)
    by_term = _sweep_terms(long_engine, long_basis.interest_rate,
                           np.array([t.last_age for t in long_basis.tables], dtype=float))
    pictures = []
    if plots is not None:
        pictures = _plot(plots, by_size, by_term, engine.api)

    # The text.
    def row(f: Figure, unit: str = "s", scale: float = 1.0, fmt: str = ".3g"):
        floor = "" if f.floor is None else f"{f.floor * scale:{fmt}} {unit}"
        ratio = "" if f.ratio is None else f"{f.ratio:.3g}"
        target = "" if f.target is None else f"{f.target:g}: {verdict(f.met)}"
        return [f.figure.removeprefix("floors: "), f"{f.value * scale:{fmt}} {unit}", floor,
                ratio, target]

    rows = [row(f1), row(f2), row(f2m, "bytes", fmt=".0f"), row(f3, "µs", 1e6),
            *[row(f, "µs", 1e6) for f in f6]]
    note = ("" if n == large else
            f" **{large:,} items were not run**: one call on {20_000:,} items took "
            f"{probe_seconds:.2f} s, so {large:,} would take about {predicted:.0f} s a call "
            f"(the budget is {LARGE_BUDGET:g} s a call, {repeats} calls); the figure is for "
            f"{n:,} items, the largest 1, 2 or 5 x 10^k that fits, and per item it stands "
            "for the larger batch only as far as time and memory grow linearly.")
    lines = [
        environment() + f"; {repeats} rounds, each timing every configuration once in turn. "
        "Engine: the median of the rounds; floor: the minimum.",
        "",
        f"Engine interface: **{engine.api}** ({why}"
        + (f"; it agrees with value_annuities to {between:.2g} relative on the "
           f"{MIXED:,} mixed items" if engine.api == "value_columns" else "")
        + f"). Basis `{BASIS}` (both sexes, one-year select period, UDD, "
        f"{rate:.0%}); the term sweep on `{LONG_BASIS}`.",
        "",
        *table(["figure", "engine", "floor", "ratio", "target"], rows),
        "",
        f"1. {MIXED:,} mixed items (every option: both sexes, select and ultimate, age "
        "adjustments, multipliers, flat extras, advance and arrears, 1 to 12 payments a year, "
        "whole life, temporary, deferred, guarantees, escalation) against "
        "`bench/reference.py`, one item at a time in pure Python. Guard: largest relative "
        "difference engine against reference, " + ", ".join(
            f"{k} {v:.2g}" for k, v in agreement.items())
        + f" (tolerance {AGREEMENT:g}): {'passed' if guard.met else '**FAILED**'}.",
        f"2. {n:,} items (40% whole life, 30% temporary, 30% deferred; annual and monthly in "
        "advance; exact ages; both sexes; multipliers; select durations) against the "
        "annuity-certain of each window in numpy. Peak memory: tracemalloc during one "
        f"engine call, {peak / 2**20:.0f} MiB."
        + (f" Building the {n:,} Item objects from the columns (outside the timing): "
           f"{prepare_seconds:.1f} s." if engine.api == "value_annuities" else "") + note,
        "3. One item (annual in advance, 10 years temporary, age 65.5) against the same floor "
        f"for one item; each timing is {ONE_CALLS} calls.",
        f"6. {BATCH:,} lives aged 55 to 85 (both sexes), whole life: annual in advance, "
        "continuous, and joint (last survivor) with a partner of the other sex within 5 "
        "years, annual in advance; the ratio is the median of each round's ratio. "
        + ("Two lives go through the same interface as the annual ones (two-life columns, "
           "`JointColumns`: the second life's columns beside the first's, valued by "
           "service/engine/joint_columns.py without Item objects); guard: they agree with "
           f"the general path to {pairs_between:.2g} relative (tolerance "
           f"{COLUMNS_AGREEMENT:g}). For information, the same pairs as Item objects "
           "through `value_annuities` (the same two-life path; the time includes reading "
           "the items into arrays). " if pair_columns is not None else
           "Two lives as Item objects through `value_annuities`, which sends them to the "
           "two-life column path, service/engine/joint_columns.py; the time includes reading "
           "the items. ")
        + "Continuous payments go through the same "
        "interface as the annual ones; guard: they agree with the general path "
        f"(`value_annuities(..., fast=False)`) to {continuous_between:.2g} relative "
        f"(tolerance {COLUMNS_AGREEMENT:g}).",
        "",
        "Seconds of each repeat: " + "; ".join(
            f"{name} {what}: " + ", ".join(f"{t:.4g}" for t in times)
            for name, s in (("1", s1), ("2", s2), ("3 (per call)", s3), ("6", s6))
            for what, times in s.items()) + ".",
        "",
        f"Time against items (`{BASIS}`, the large batch's mix; engine: the median at the "
        "largest size, else the minimum of a few calls; floor: the minimum):",
        "",
        *table(["items", "engine (s)", "floor (s)", "engine / floor"],
               [[f"{k:,}", f"{e:.3g}", f"{f:.3g}", f"{e / f:.0f}"] for k, e, f in by_size]),
        "",
        f"Time against a monthly temporary term, {SWEEP_TERM_ITEMS:,} lives aged 20 to 25 "
        f"in advance (`{LONG_BASIS}`):",
        "",
        *table(["term (years)", "engine (s)", "floor (s)", "engine / floor"],
               [[f"{k}", f"{e:.3g}", f"{f:.3g}", f"{e / f:.0f}"] for k, e, f in by_term]),
        "",
        *[f"![{alt}]({name})" for name, alt in pictures],
    ]
    return Section("Floors (issue 11): the engine against the pure-Python reference and the "
                   "annuity-certain floor", lines, figures, failures)


def _sweep_sizes(engine: Engine, big: dict, rate: float, last_ages, largest: int,
                 largest_engine: float, largest_floor: float):
    """(items, engine seconds, floor seconds) for sizes up to ``largest`` (whose figures are
    the large batch's own)."""
    out = []
    for size in [s for s in SWEEP_SIZES if s < largest]:
        cols = take(big, slice(0, size))
        prepared = engine.prepare(cols)
        calls = max(1, 1_000 // size)
        rounds = 2 if size >= 100_000 else 5
        seconds = side_by_side({
            "engine": _per_call(lambda p=prepared: engine.value(p), calls),
            "floor": _per_call(lambda c=cols: certain_floor(c, rate, last_ages), calls)},
            rounds)
        out.append((size, min(seconds["engine"]) / calls, min(seconds["floor"]) / calls))
    out.append((largest, largest_engine, largest_floor))
    return out


def _sweep_terms(engine: Engine, rate: float, last_ages):
    """(term, engine seconds, floor seconds) for monthly temporary annuities."""
    rng = np.random.default_rng(17)
    ages = rng.uniform(20, 25, SWEEP_TERM_ITEMS)
    sexes = np.zeros(SWEEP_TERM_ITEMS, dtype=np.int64)
    out = []
    for term in SWEEP_TERMS:
        cols = simple_columns(ages, sexes, "advance", 12, term=term)
        prepared = engine.prepare(cols)
        seconds = side_by_side({"engine": lambda p=prepared: engine.value(p),
                                "floor": lambda c=cols: certain_floor(c, rate, last_ages)}, 5)
        out.append((term, min(seconds["engine"]), min(seconds["floor"])))
    return out


def _plot(folder: Path, by_size, by_term, api: str) -> list[tuple[str, str]]:
    """Write the two PNG plots into ``folder``; return (file name, description) of each."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    folder.mkdir(parents=True, exist_ok=True)
    written = []
    for name, data, xlabel, title, alt in (
            ("floors-items.png", by_size, "items in the batch",
             f"Time against items ({BASIS}, mixed single-life)",
             "time against items, log-log"),
            ("floors-term.png", by_term, "term (years), monthly in advance",
             f"Time against term ({SWEEP_TERM_ITEMS:,} items, {LONG_BASIS})",
             "time against term, log-log")):
        x = [d[0] for d in data]
        fig, ax = plt.subplots(figsize=(7, 4.5), dpi=100)
        ax.loglog(x, [d[1] for d in data], "o-", label=f"engine ({api})")
        ax.loglog(x, [d[2] for d in data], "s--", label="floor: annuity-certain in numpy")
        if name == "floors-items.png":
            ax.loglog(x, [LARGE_TARGET * d[2] for d in data], ":", color="grey",
                      label=f"target for the engine: {LARGE_TARGET:g} x floor")
        ax.set_xlabel(xlabel)
        ax.set_ylabel("seconds per call")
        ax.set_title(title, fontsize=10)
        ax.grid(True, which="both", alpha=0.3)
        ax.legend()
        fig.tight_layout()
        fig.savefig(folder / name)
        plt.close(fig)
        written.append((name, alt))
    return written


def profile(items: int = BATCH) -> str:
    """Profile the engine with pyinstrument on ``items`` items of the large batch's mix and
    return the text report."""
    from pyinstrument import Profiler

    registry = create_app().extensions["registry"]
    basis, valuation = _basis(registry, BASIS)
    cols = large_columns(items)
    engine, why, _ = choose_engine(basis.tables, valuation, take(cols, slice(0, 200)))
    prepared = engine.prepare(cols)
    engine.value(prepared)  # warm
    profiler = Profiler(interval=0.0005)
    profiler.start()
    for _ in range(3):
        engine.value(prepared)
    profiler.stop()
    return (f"engine: {engine.api} ({why}); {items:,} items, 3 calls\n"
            + profiler.output_text(unicode=False, color=False, show_all=False))


def main() -> int:
    parser = argparse.ArgumentParser(description="The floors suite alone.")
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--large", type=int, default=LARGE, help="items of figure 2")
    parser.add_argument("--plots", type=Path, help="write the PNG plots into this folder")
    parser.add_argument("--profile", action="store_true",
                        help=f"profile the engine on {BATCH:,} items with pyinstrument")
    args = parser.parse_args()
    if args.profile:
        print(profile())
        return 0
    section = run(args.repeats, args.plots, args.large)
    print(section.markdown())
    for failure in section.failures:
        print(f"FAILED: {failure}", file=sys.stderr)
    return 1 if section.failures else 0


if __name__ == "__main__":
    raise SystemExit(main())
