"""Bases as they are kept: a batch under a generational improvement scale, against the same
batch under a static table.

The project's target (issue 10): a batch of 10,000 items spread over 40 birth years, under a
basis that projects mortality generationally, costs at most 2x the same batch under a basis
whose tables are static (each cohort's table is projected once per request and shared by
every item of the cohort, never once per item). Both go through the whole HTTP path (the
Flask test client: parse, validate, value, serialise), side by side in one run, median of
the repeats; the ratio is the median of each round's ratio.

- static: `fernhollow-annuitants@2026.1` (the same female and male tables, no scale);
- generational, cold: `fernhollow-pensioners@2026.1` with the cohort cache emptied before
  each request, so every one of the 80 cohort tables (40 birth years, 2 sexes) is built in
  the request;
- generational, warm: the same, the cache kept (as a service answering repeated batches);
- dates of birth: the cold case with each life given by date of birth instead of age
  (the ages derived by the basis' age definition).
"""

import datetime

import numpy as np

from bench.common import Figure, Section, median, side_by_side, table, verdict
from service import create_app
from service.bases.cohorts import cohort_table

TARGET = 2.0
STATIC = "fernhollow-annuitants@2026.1"
IMPROVED = "fernhollow-pensioners@2026.1"
VALUATION_DATE = datetime.date(2026, 12, 31)


def _items(count: int, dated: bool) -> list[dict]:
    rng = np.random.default_rng(10)
    ages = rng.uniform(50, 90, count)  # 40 whole ages at the valuation date: 40 birth years
    sexes = rng.integers(0, 2, count)
    items = []
    for age, sex in zip(ages, sexes, strict=True):
        if dated:
            born = VALUATION_DATE - datetime.timedelta(days=int(age * 365.25))
            life = {"date_of_birth": born.isoformat()}
        else:
            life = {"age": float(age)}
        life["sex"] = ("female", "male")[int(sex)]
        items.append({"lives": [life], "timing": "advance", "frequency": 12})
    return items


def run(items_count: int = 10_000, repeats: int = 5) -> Section:
    client = create_app({"TESTING": True}).test_client()
    by_age, by_date = _items(items_count, False), _items(items_count, True)

    def post(basis: str, items, cold: bool = False):
        if cold:
            cohort_table.cache_clear()
        body = {"basis": basis, "items": items, "valuation_date": VALUATION_DATE.isoformat()}
        response = client.post("/v1/annuity-factors", json=body)
        assert response.status_code == 200, response.get_data(as_text=True)[:500]
        return response

    post(IMPROVED, by_age)  # warm the cache for the warm case
    tasks = {
        "static": lambda: post(STATIC, by_age),
        "cold": lambda: post(IMPROVED, by_age, cold=True),
        "warm": lambda: post(IMPROVED, by_age),
        "dated": lambda: post(IMPROVED, by_date, cold=True),
    }
    seconds = side_by_side(tasks, repeats)

    def paired(name):
        return median([t / b for t, b in zip(seconds[name], seconds["static"], strict=True)])

    labels = {"cold": "generational, cohort tables built in the request",
              "warm": "generational, cohort tables from the cache",
              "dated": "generational, built in the request, lives by date of birth"}
    figures, rows = [], []
    for name, label in labels.items():
        f = Figure(f"mortality: {label} / static table, {items_count:,} items over 40 birth "
                   "years", median(seconds[name]), "s", floor=median(seconds["static"]),
                   ratio=paired(name), target=TARGET)
        figures.append(f)
        rows.append([label, f"{f.floor:.3f}", f"{f.value:.3f}", f"{f.ratio:.2f}",
                     f"{TARGET:g}x: {verdict(f.met)}"])
    lines = [f"{items_count:,} single lives aged 50 to 90 (40 birth years, both sexes: 80 "
             f"cohort tables), monthly in advance, POST /v1/annuity-factors through the Flask "
             f"test client; static `{STATIC}` against generational `{IMPROVED}` at "
             f"{VALUATION_DATE}; {repeats} rounds, each timing every configuration once in "
             "turn.", "",
             *table(["configuration", "static (s)", "configuration (s)", "ratio", "target"],
                    rows), ""]
    return Section("Improvement scales and dates (issue 10)", lines, figures)
