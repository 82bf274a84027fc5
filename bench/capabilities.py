"""Whole capabilities side by side: batches against one item at a time, Woolhouse against
exact summation, the engine's share of an HTTP request.

    .venv/bin/python bench/run.py --only capabilities [--items N] [--repeats R]
"""

import logging
import tracemalloc

import numpy as np

from bench.common import MIB, Figure, Section, environment, median, side_by_side, table, timed
from service import create_app
from service.engine.annuity import Item, Life, Payments, Valuation, annuity_values

#: Items valued one request at a time, to compare with the batch.
SINGLES = 200


def _items(n: int, timing: str, frequency: int, rng) -> list[Item]:
    ages = rng.uniform(50, 90, n).round(2)
    guarantees = rng.choice([0, 5, 10], n)
    return [Item((Life(float(a)),), Payments(timing, frequency, None, 0.0, float(g), 0.02))
            for a, g in zip(ages, guarantees, strict=True)]


def run(items_count: int = 10_000, repeats: int = 3) -> Section:
    n = items_count
    rng = np.random.default_rng(2026)
    app = create_app()
    basis = app.extensions["registry"].resolve("standard-ultimate")
    val = Valuation(basis.interest, basis.fractional_age, basis.approximation)
    wool = Valuation(basis.interest, basis.fractional_age, "woolhouse-3")
    tables = basis.tables
    batches = {label: _items(n, timing, m, rng) for label, timing, m in
               [("annual in advance", "advance", 1), ("monthly in arrears", "arrears", 12),
                ("continuous", "continuous", 1)]}
    monthly = _items(n, "advance", 12, rng)
    client = app.test_client()
    # The request log line the app writes per request is not wanted in the results.
    logging.disable(logging.INFO)
    body = {"basis": "standard-ultimate", "items": [
        {"lives": [{"age": it.lives[0].age}], "timing": "advance", "frequency": 12,
         "guarantee": it.payments.guarantee, "escalation": 0.02} for it in monthly]}

    def http():
        response = client.post("/v1/annuity-factors", json=body)
        assert response.status_code == 200, response.json

    tasks = {label: (lambda items=items: annuity_values(tables, items, val))
             for label, items in batches.items()}
    tasks["exact"] = lambda: annuity_values(tables, monthly, val)
    tasks["woolhouse"] = lambda: annuity_values(tables, monthly, wool)
    tasks["http"] = http
    seconds = side_by_side(tasks, repeats)
    med = {k: median(v) for k, v in seconds.items()}

    rows, figures = [], []
    for label, items in batches.items():
        sample = items[:SINGLES]
        single = timed(lambda s=sample: [annuity_values(tables, [it], val) for it in s])
        gain = (single / len(sample)) / (med[label] / n)
        rows.append([f"{n:,} items, {label}: batch", f"{med[label]:.3f}",
                     f"{med[label] / n * 1e6:.1f}", f"{gain:.1f}"])
        figures.append(Figure(f"capabilities: {label}, one item at a time / in a batch of "
                              f"{n:,}, per item", single / len(sample), "s per item",
                              floor=med[label] / n))
    exact, woolhouse, through = med["exact"], med["woolhouse"], med["http"]
    rows.append([f"{n:,} items, monthly: exact summation", f"{exact:.3f}",
                 f"{exact / n * 1e6:.1f}", "1.00"])
    rows.append([f"{n:,} items, monthly: Woolhouse 3-term", f"{woolhouse:.3f}",
                 f"{woolhouse / n * 1e6:.1f}", f"{exact / woolhouse:.2f}"])
    rows.append([f"{n:,} items, monthly, through HTTP (in-process)", f"{through:.3f}",
                 f"{through / n * 1e6:.1f}", f"{exact / through:.2f}"])
    figures.append(Figure("capabilities: monthly, three-term Woolhouse / exact summation",
                          woolhouse, "s", floor=exact))
    figures.append(Figure("capabilities: monthly, through HTTP in-process / engine alone",
                          through, "s", floor=exact))

    tracemalloc.start()
    annuity_values(tables, monthly, val)
    engine_peak = tracemalloc.get_traced_memory()[1] / MIB
    tracemalloc.reset_peak()
    http()
    http_peak = tracemalloc.get_traced_memory()[1] / MIB
    tracemalloc.stop()
    figures.append(Figure(f"capabilities: {n:,} monthly items through HTTP, peak memory / "
                          "engine alone", http_peak, "MiB", floor=engine_peak))

    lines = [
        environment() + f"; median of {repeats} repeats, configurations timed in turn.",
        "",
        "Ratio column: for batches, time per item when valued one at a time "
        f"({SINGLES} items) divided by time per item in the batch (the gain from "
        "vectorising over items); for Woolhouse, exact time / Woolhouse time; for HTTP, the "
        "engine's share of the request time.",
        "",
        *table(["what", "seconds", "microseconds per item", "ratio"], rows),
        "",
        f"Peak memory (tracemalloc) for {n:,} monthly items: engine {engine_peak:.1f} MiB; "
        f"the whole HTTP request in-process {http_peak:.1f} MiB.",
    ]
    logging.disable(logging.NOTSET)
    return Section("Capabilities", lines, figures)
