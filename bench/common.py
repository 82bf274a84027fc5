"""What the benchmark suites share: timing side by side, figures, and the results' form.

Every suite returns a :class:`Section`: markdown lines for bench/results/latest.md and
:class:`Figure` rows for bench/results/latest.json. The machine is shared and noisy, so
configurations that are compared are timed in turn within one run (round robin), and each
figure is the median of its repeats.
"""

import gc
import math
import os
import platform
import statistics
import sys
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

MIB = 2**20


@dataclass
class Figure:
    """One measured figure, as it goes into latest.json.

    ``value`` is what was measured (in ``unit``); ``floor`` is what it is divided by to give
    ``ratio`` (the baseline configuration, or the budget); ``met`` says whether ``ratio`` is at
    most ``target`` (None where a figure has no target).
    """

    figure: str
    value: float
    unit: str
    floor: float | None = None
    target: float | None = None
    ratio: float | None = field(default=None)
    met: bool | None = field(default=None)

    def __post_init__(self):
        if self.floor and self.ratio is None:
            self.ratio = self.value / self.floor
        if self.target is not None and self.met is None:
            measured = self.ratio if self.ratio is not None else self.value
            self.met = bool(measured <= self.target)

    def to_json(self) -> dict:
        out = asdict(self)
        for key in ("value", "floor", "ratio", "target"):
            if isinstance(out[key], float):
                out[key] = _json_float(out[key])
        return {k: out[k] for k in ("figure", "value", "floor", "ratio", "target", "unit",
                                    "met")}


def _json_float(x: float) -> float | None:
    if not math.isfinite(x):
        return None
    return float(f"{x:.6g}")


@dataclass
class Section:
    """A suite's results: a markdown section and its figures."""

    title: str
    lines: list[str]
    figures: list[Figure]
    #: Correctness guards that failed (the run exits non-zero after writing the results).
    failures: list[str] = field(default_factory=list)

    def markdown(self) -> str:
        return "\n".join([f"## {self.title}", "", *self.lines, ""])


def timed(fn: Callable[[], object]) -> float:
    """Return the seconds one call of ``fn`` takes (after a garbage collection)."""
    gc.collect()
    t0 = time.perf_counter()
    fn()
    return time.perf_counter() - t0


def side_by_side(tasks: dict[str, Callable[[], object]], repeats: int) -> dict[str, list[float]]:
    """Time every task ``repeats`` times, in turn (round robin), so that a burst of load on the
    shared machine falls on all of them alike; return the seconds of each repeat by task."""
    seconds: dict[str, list[float]] = {name: [] for name in tasks}
    for _ in range(repeats):
        for name, fn in tasks.items():
            seconds[name].append(timed(fn))
    return seconds


def median(values: list[float]) -> float:
    return statistics.median(values)


def environment() -> str:
    """One line saying where the figures were measured."""
    load = ", ".join(f"{x:.2f}" for x in os.getloadavg())
    return (f"Python {platform.python_version()}, numpy {np.__version__}, "
            f"{platform.machine()}, {os.cpu_count()} CPUs, load average {load} at the start")


def resident_mib() -> float:
    """Resident set size of this process in MiB (Linux; NaN elsewhere)."""
    try:
        with open("/proc/self/status", encoding="ascii") as status:
            for line in status:
                if line.startswith("VmRSS:"):
                    return int(line.split()[1]) / 1024
    except OSError:
        pass
    return math.nan


def table(header: list[str], rows: list[list[str]], align: str | None = None) -> list[str]:
    """Return a markdown table; ``align`` gives 'l' or 'r' per column (first left, rest right
    by default)."""
    align = align or "l" + "r" * (len(header) - 1)
    rule = ["---" if a == "l" else "---:" for a in align]
    return ["| " + " | ".join(header) + " |", "| " + " | ".join(rule) + " |",
            *["| " + " | ".join(row) + " |" for row in rows]]


def verdict(met: bool | None) -> str:
    return "" if met is None else ("met" if met else "**not met**")
