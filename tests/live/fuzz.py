"""Fuzz the running gunicorn service with schemathesis: every operation, every check.

    make fuzz                                   # 300 cases per operation
    .venv/bin/python -m tests.live.fuzz --max-examples 50

Exits with schemathesis' status: 0 only when no check failed.
"""

import argparse
import subprocess
import sys
from pathlib import Path

from tests.live.server import ROOT, running_service

SCHEMATHESIS = Path(sys.executable).with_name("schemathesis")


def run_fuzz(max_examples: int, *, workers: int = 2, seed: int | None = None,
             capture: bool = False) -> subprocess.CompletedProcess:
    with running_service(workers=workers) as (url, _):
        argv = [str(SCHEMATHESIS), "run", f"{url}/openapi.json",
                "--checks", "all", "--mode", "all",
                "--max-examples", str(max_examples),
                "--phases", "examples,coverage,fuzzing",
                "--suppress-health-check", "too_slow,filter_too_much",
                "--request-timeout", "30", "--no-color"]
        if seed is not None:
            argv += ["--seed", str(seed)]
        return subprocess.run(argv, cwd=ROOT, capture_output=capture, text=True, check=False)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--max-examples", type=int, default=300)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--seed", type=int)
    args = parser.parse_args()
    return run_fuzz(args.max_examples, workers=args.workers, seed=args.seed).returncode


if __name__ == "__main__":
    raise SystemExit(main())
