"""Benchmark of the interest structures (service.engine.curves) beside the engine.

Until the engine takes a structure, this measures the parts a structure adds, on the payment
dates of a 10,000-item monthly batch, next to the engine's whole valuation of that batch at a
flat rate, and estimates the batch's time on a 30-term spot curve as
engine - (flat discounting) + (curve discounting). Shared, noisy machines: read the ratios.

    .venv/bin/python bench/curves.py [--items N]     # writes bench/results/curves.md
"""

import argparse
import platform
import sys
import time
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from service import create_app  # noqa: E402
from service.engine.annuity import Item, Life, Payments, Valuation, annuity_values  # noqa: E402
from service.engine.curves import Curve  # noqa: E402

SPOT_30 = {"kind": "spot", "terms": list(range(1, 31)),
           "rates": [0.03 + 0.012 * (1 - np.exp(-k / 8)) for k in range(1, 31)]}
STRUCTURES = {
    "spot curve, 30 terms": SPOT_30,
    "segments, 3 bands": {"kind": "segments", "edges": [5, 20], "rates": [0.045, 0.052, 0.055]},
    "forward bands, 2": {"kind": "forward", "edges": [10], "rates": [0.05, 0.035]},
}


def _best(fn, repeats: int) -> float:
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def main() -> int:
    parser = argparse.ArgumentParser()
    parser.add_argument("--items", type=int, default=10_000)
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    n = args.items
    rng = np.random.default_rng(2026)
    basis = create_app().extensions["registry"].resolve("standard-ultimate")
    val = Valuation(basis.interest_rate, basis.fractional_age, basis.approximation)
    ages = rng.uniform(50, 90, n).round(2)
    items = [Item((Life(float(a)),), Payments("advance", 12, None, 0.0, 0.0, 0.02))
             for a in ages]
    engine = _best(lambda: annuity_values(basis.tables, items, val), args.repeats)

    # The batch's payment dates: monthly from 0 until the table's end (age 131).
    counts = np.floor((131 - ages) * 12).astype(np.int64)
    owner = np.repeat(np.arange(n), counts)
    firsts = np.cumsum(counts) - counts
    t = (np.arange(counts.sum()) - np.repeat(firsts, counts)) / 12.0
    pv = np.exp(-0.03 * t)
    delta = np.log1p(basis.interest_rate)
    flat = _best(lambda: np.exp(-delta * t), args.repeats)
    rows = [(f"engine, {n:,} monthly items at a flat rate (whole valuation)", engine, 1.0),
            (f"flat discount exp(-delta t) on its {t.size:,} payment dates", flat, 1.0)]
    for label, mapping in STRUCTURES.items():
        curve = Curve.from_mapping(mapping)
        disc = _best(lambda c=curve: c.discount(t), args.repeats)
        rows.append((f"{label}: discount on the same dates", disc, disc / flat))
        rows.append((f"{label}: estimated engine batch", engine - flat + disc,
                     (engine - flat + disc) / engine))
    spot = Curve.from_mapping(SPOT_30)
    moments = _best(lambda: spot.moments(owner, t, pv, n).measures(), args.repeats)
    plain = _best(lambda: spot.moments(owner, t, pv, n, key_rates=False), args.repeats)
    rows.append(("spot curve: duration, convexity and 30 key-rate durations", moments,
                 moments / engine))
    rows.append(("spot curve: duration and convexity only", plain, plain / engine))

    # Continuous: segments of a year cut at whole years of the window and at whole ages.
    frac = ages - np.floor(ages)
    years = np.ceil(131 - ages).astype(np.int64)
    seg_owner = np.repeat(np.arange(n), 2 * years)
    k = np.arange(seg_owner.size) - np.repeat(np.cumsum(2 * years) - 2 * years, 2 * years)
    cuts = np.where(k % 2 == 0, k // 2, k // 2 + 1 - frac[seg_owner])
    nxt = np.where(k % 2 == 0, k // 2 + 1 - frac[seg_owner], k // 2 + 1)
    t1, length = cuts.astype(float), (nxt - cuts).astype(float)
    pieces = _best(lambda: spot.pieces(t1, length), args.repeats)
    # Rules are built chunk by chunk, as the engine values its batches.
    chunks = np.array_split(np.arange(t1.size), max(1, t1.size // 80_000))

    def rules(**options):
        return sum(spot.gauss_rule(t1[c], length[c], **options).time.size for c in chunks)

    rule_time = _best(lambda: rules(order=8, correction=True), args.repeats)
    full = _best(lambda: rules(order=12), args.repeats)
    points = rules(order=8, correction=True)
    rows.append((f"spot curve: pieces (factor, force, curvature) of {t1.size:,} segments",
                 pieces, pieces / engine))
    rows.append((f"spot curve: correction rule, order 8 ({points:,} points)",
                 rule_time, rule_time / engine))
    rows.append(("spot curve: full rule for moments, order 12", full, full / engine))

    lines = [
        f"# Interest structures ({datetime.now(UTC):%Y-%m-%d %H:%M} UTC)",
        "",
        f"Python {platform.python_version()}, numpy {np.__version__}, {platform.machine()}; "
        f"best of {args.repeats}. Ratio: discounting rows to the flat discount; estimated "
        "batches and the other rows to the engine's whole flat valuation. The survival "
        "evaluated at the continuous rule's points is not included (the engine does it).",
        "",
        "| what | seconds | ratio |",
        "| --- | ---: | ---: |",
    ]
    lines += [f"| {w} | {s:.3f} | {r:.2f} |" for w, s, r in rows]
    out = ROOT / "bench" / "results" / "curves.md"
    out.write_text("\n".join(lines) + "\n")
    print("\n".join(lines))
    print(f"wrote {out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
