"""Run every benchmark and write bench/results/latest.md and latest.json.

    make bench                                    # everything, a few minutes
    .venv/bin/python -m bench.run --only curves   # one suite (curves, risk, costly,
                                                  # capabilities, mortality, floors, http),
                                                  # printed, results left as they were

Shared, noisy machines: read the ratios, not the seconds. See bench/README.md.
"""

import argparse
import json
import sys
import time
from datetime import UTC, datetime
from pathlib import Path

if __package__ in (None, ""):
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from bench import capabilities, costly, curves, floors, http_path, mortality, risk  # noqa: E402
from bench.common import ROOT, environment  # noqa: E402

SUITES = ("curves", "risk", "costly", "capabilities", "mortality", "floors", "http")


def main() -> int:
    parser = argparse.ArgumentParser(description="Run the benchmarks.")
    parser.add_argument("--only", help=f"comma-separated suites of {', '.join(SUITES)}; "
                                       "prints them and writes no results")
    parser.add_argument("--items", type=int, default=10_000,
                        help="items in the curves and capabilities batches")
    parser.add_argument("--repeats", type=int, default=5,
                        help="repeats of each timing in curves and capabilities (median)")
    parser.add_argument("--costly-repeats", type=int, default=3,
                        help="repeats of each costly request (median)")
    parser.add_argument("--kinds", help="costly kinds to run, separated by ';' (default all)")
    parser.add_argument("--large", type=int, default=floors.LARGE,
                        help="items in the floors suite's large batch (figure 2)")
    parser.add_argument("--out", type=Path, default=ROOT / "bench" / "results")
    args = parser.parse_args()
    chosen = args.only.split(",") if args.only else list(SUITES)
    unknown = set(chosen) - set(SUITES)
    if unknown:
        parser.error(f"unknown suites: {', '.join(sorted(unknown))}")

    started = time.perf_counter()
    header = environment()
    sections = []
    for name in SUITES:
        if name not in chosen:
            continue
        print(f"{name}...", file=sys.stderr, flush=True)
        if name == "curves":
            sections.append(curves.run(args.items, args.repeats))
        elif name == "risk":
            sections.append(risk.run(args.items, args.repeats))
        elif name == "costly":
            kinds = args.kinds.split(";") if args.kinds else None
            sections.append(costly.run(args.costly_repeats, kinds))
        elif name == "mortality":
            sections.append(mortality.run(args.items, args.repeats))
        elif name == "floors":
            # The PNG plots go with the results: only when they are written.
            sections.append(floors.run(args.repeats, None if args.only else args.out,
                                       args.large))
        elif name == "http":
            sections.append(http_path.run(args.repeats))
        else:
            sections.append(capabilities.run(args.items, args.repeats))
    elapsed = time.perf_counter() - started

    text = "\n".join([
        f"# Benchmarks ({datetime.now(UTC):%Y-%m-%d %H:%M} UTC)", "",
        f"{header}. Whole run: {elapsed:.0f} s. Written by `make bench`; what each figure "
        "means: bench/README.md.", "",
        *[section.markdown() for section in sections]])
    print(text)
    figures = [f.to_json() for section in sections for f in section.figures]
    if not args.only:
        args.out.mkdir(parents=True, exist_ok=True)
        (args.out / "latest.md").write_text(text)
        (args.out / "latest.json").write_text(json.dumps(figures, indent=1) + "\n")
        print(f"wrote {args.out / 'latest.md'} and {args.out / 'latest.json'}", file=sys.stderr)
    failures = [f for section in sections for f in section.failures]
    for failure in failures:
        print(f"FAILED: {failure}", file=sys.stderr)
    return 1 if failures else 0


if __name__ == "__main__":
    raise SystemExit(main())
