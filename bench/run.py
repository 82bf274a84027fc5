"""Benchmarks of whole capabilities, measured side by side in one run.

Writes bench/results/latest.md. Shared, noisy machines: read the ratios, not the seconds.

    make bench            # or: .venv/bin/python bench/run.py [--items N]
"""

import argparse
import platform
import statistics
import sys
import time
import tracemalloc
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from service import create_app  # noqa: E402
from service.engine.annuity import Item, Life, Payments, Valuation, annuity_values  # noqa: E402


def _items(n: int, timing: str, frequency: int, rng) -> list[Item]:
    ages = rng.uniform(50, 90, n).round(2)
    guarantees = rng.choice([0, 5, 10], n)
    return [Item((Life(float(a)),), Payments(timing, frequency, None, 0.0, float(g), 0.02))
            for a, g in zip(ages, guarantees, strict=True)]


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
    app = create_app()
    basis = app.extensions["registry"].resolve("standard-ultimate")
    val = Valuation(basis.interest_rate, basis.fractional_age, basis.approximation)
    wool = Valuation(basis.interest_rate, basis.fractional_age, "woolhouse-3")
    tables = basis.tables
    rows = []

    for label, timing, m in [("annual in advance", "advance", 1),
                             ("monthly in arrears", "arrears", 12),
                             ("continuous", "continuous", 1)]:
        items = _items(n, timing, m, rng)
        batch = _best(lambda items=items: annuity_values(tables, items, val), args.repeats)
        sample = items[:200]
        single = _best(lambda s=sample: [annuity_values(tables, [it], val) for it in s], 1)
        single_per_item = single / len(sample)
        rows.append((f"{n:,} items, {label}: batch", batch, batch / n * 1e6,
                     single_per_item / (batch / n)))
    items = _items(n, "advance", 12, rng)
    exact = _best(lambda: annuity_values(tables, items, val), args.repeats)
    woolhouse = _best(lambda: annuity_values(tables, items, wool), args.repeats)
    rows.append((f"{n:,} items, monthly: exact summation", exact, exact / n * 1e6, 1.0))
    rows.append((f"{n:,} items, monthly: Woolhouse 3-term", woolhouse, woolhouse / n * 1e6,
                 exact / woolhouse))

    tracemalloc.start()
    annuity_values(tables, items, val)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()

    client = app.test_client()
    body = {"basis": "standard-ultimate", "items": [
        {"lives": [{"age": it.lives[0].age}], "timing": "advance", "frequency": 12,
         "guarantee": it.payments.guarantee, "escalation": 0.02} for it in items]}
    http = []
    for _ in range(args.repeats):
        t0 = time.perf_counter()
        response = client.post("/v1/annuity-factors", json=body)
        http.append(time.perf_counter() - t0)
        assert response.status_code == 200, response.json
    http_best = min(http)
    rows.append((f"{n:,} items, monthly, through HTTP (in-process)", http_best,
                 http_best / n * 1e6, exact / http_best))

    lines = [
        f"# Benchmarks ({datetime.now(UTC):%Y-%m-%d %H:%M} UTC)",
        "",
        f"Python {platform.python_version()}, numpy {np.__version__}, {platform.machine()}; "
        f"best of {args.repeats}. Ratio column: for batches, time per item when valued one "
        "at a time divided by time per item in the batch (the gain from vectorising over "
        "items); for Woolhouse, exact time / Woolhouse time; for HTTP, engine share of the "
        "request time.",
        "",
        "| what | seconds | microseconds per item | ratio |",
        "| --- | ---: | ---: | ---: |",
    ]
    lines += [f"| {w} | {s:.3f} | {us:.1f} | {r:.2f} |" for w, s, us, r in rows]
    lines += ["", f"Peak memory allocated by the engine for {n:,} monthly items: "
                  f"{peak / 2**20:.1f} MiB (tracemalloc).", "",
              f"HTTP times over repeats: {', '.join(f'{t:.3f}' for t in http)} s "
              f"(median {statistics.median(http):.3f}).", ""]
    out = ROOT / "bench" / "results" / "latest.md"
    out.write_text("\n".join(lines))
    print("\n".join(lines))
    print(f"wrote {out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
