"""Faults, measured: load, a killed worker, a graceful stop, and bad tables at start-up.

    make faults        # about two and a half minutes; prints a summary table at the end

Starts the real gunicorn service on loopback (127.0.0.1 only), drives it with concurrent
clients, injects the faults and prints the figures. Exits non-zero if any expectation fails:
zero errors under load; a SIGKILLed worker replaced, with no more failed requests than it had
in flight; SIGTERM drains every request a worker accepted and exits 0; a corrupt table is
refused while the rest are served and readiness reports it; an unreadable tables folder stops
start-up with a clear message and a non-zero exit.
"""

import argparse
import http.client
import json
import os
import random
import shutil
import signal
import subprocess
import sys
import tempfile
import threading
import time
import uuid
from pathlib import Path

from service.serving import GUNICORN_CONF
from tests.live.server import GUNICORN, ROOT, free_port, running_service

SINGLE = {"basis": "fernhollow-annuitants", "items": [
    {"lives": [{"age": 65.5, "sex": "female"}], "timing": "advance", "frequency": 12,
     "guarantee": 5}]}


def _batch(n: int, rng: random.Random) -> dict:
    return {"basis": "standard-ultimate", "items": [
        {"lives": [{"age": round(rng.uniform(50, 90), 2)}], "timing": rng.choice(
            ["advance", "arrears", "continuous"]), "frequency": 12, "escalation": 0.02}
        for _ in range(n)]}


class Load:
    """Concurrent clients posting mixed single and batch requests until stopped."""

    def __init__(self, url: str, connections: int, seed: int = 7):
        self.host, self.port = url.removeprefix("http://").split(":")
        self.connections = connections
        self.stop = threading.Event()
        self.lock = threading.Lock()
        self.latencies: list[float] = []
        self.ok = 0
        self.refused = 0  # could not connect: the server was not accepting
        self.failed: list[tuple[str, str]] = []  # (request id, what went wrong)
        self.rng = random.Random(seed)
        self.bodies = [json.dumps(SINGLE)] * 4 + [json.dumps(_batch(50, self.rng))]
        self.threads = [threading.Thread(target=self._run, daemon=True)
                        for _ in range(connections)]

    def start(self):
        for t in self.threads:
            t.start()
        return self

    def finish(self):
        self.stop.set()
        for t in self.threads:
            t.join(timeout=60)

    def _run(self):
        rng = random.Random(threading.get_ident())
        while not self.stop.is_set():
            body = rng.choice(self.bodies)
            rid = uuid.uuid4().hex
            conn = http.client.HTTPConnection(self.host, int(self.port), timeout=60)
            t0 = time.perf_counter()
            try:
                conn.connect()
            except ConnectionRefusedError:
                with self.lock:
                    self.refused += 1
                time.sleep(0.05)
                continue
            try:
                conn.request("POST", "/v1/annuity-factors", body=body,
                             headers={"Content-Type": "application/json", "X-Request-ID": rid})
                response = conn.getresponse()
                payload = response.read()
                status = response.status
            except (OSError, http.client.HTTPException) as exc:
                with self.lock:
                    self.failed.append((rid, type(exc).__name__))
                continue
            finally:
                conn.close()
            elapsed = time.perf_counter() - t0
            with self.lock:
                if status == 200 and b'"results"' in payload:
                    self.ok += 1
                    self.latencies.append(elapsed)
                else:
                    self.failed.append((rid, f"HTTP {status}"))

    def percentile(self, p: float) -> float:
        data = sorted(self.latencies)
        if not data:
            return float("nan")
        return data[min(len(data) - 1, int(p / 100 * len(data)))]


def _workers(master_pid: int) -> set[int]:
    out = subprocess.run(["ps", "-o", "pid=", "--ppid", str(master_pid)], capture_output=True,
                         text=True, check=False).stdout
    return {int(x) for x in out.split()}


def _wait_workers(master_pid: int, count: int, timeout: float = 30.0) -> set[int]:
    deadline = time.monotonic() + timeout
    pids = _workers(master_pid)
    while len(pids) < count and time.monotonic() < deadline:
        time.sleep(0.1)
        pids = _workers(master_pid)
    return pids


def _get(url: str, path: str):
    host, port = url.removeprefix("http://").split(":")
    conn = http.client.HTTPConnection(host, int(port), timeout=10)
    try:
        conn.request("GET", path)
        response = conn.getresponse()
        return response.status, response.read()
    finally:
        conn.close()


def scenario_load(seconds: float, connections: int) -> dict:
    with running_service(workers=4) as (url, _):
        load = Load(url, connections).start()
        time.sleep(seconds)
        load.finish()
    return {"requests": load.ok + len(load.failed), "errors": len(load.failed) + load.refused,
            "p50_ms": load.percentile(50) * 1000, "p99_ms": load.percentile(99) * 1000,
            "passed": not load.failed and load.refused == 0 and load.ok > 0}


def scenario_kill(seconds: float, connections: int) -> dict:
    with running_service(workers=4) as (url, proc):
        before = _wait_workers(proc.pid, 4)
        load = Load(url, connections).start()
        time.sleep(seconds / 2)
        victim = sorted(before)[0]
        os.kill(victim, signal.SIGKILL)
        time.sleep(seconds / 2)
        load.finish()
        after = _wait_workers(proc.pid, len(before))
    replaced = len(after) == len(before) and victim not in after
    # A sync worker holds one request at a time: at most one can be lost with it.
    in_flight_bound = 1
    return {"requests": load.ok + len(load.failed), "failed": len(load.failed),
            "in_flight_bound": in_flight_bound, "replaced": replaced,
            "passed": replaced and len(load.failed) <= in_flight_bound and load.refused == 0}


def scenario_term(seconds: float, connections: int) -> dict:
    log_path = Path(tempfile.mkstemp(prefix="annuity-term-", suffix=".log")[1])
    with log_path.open("wb") as log, running_service(workers=4, log=log) as (url, proc):
        load = Load(url, connections).start()
        time.sleep(seconds)
        t0 = time.monotonic()
        proc.send_signal(signal.SIGTERM)
        code = proc.wait(timeout=60)
        drain = time.monotonic() - t0
        load.finish()
    logged = set()
    for line in log_path.read_text(errors="replace").splitlines():
        if line.startswith("{"):
            try:
                logged.add(json.loads(line)["request_id"])
            except (ValueError, KeyError):
                pass
    log_path.unlink()
    # A request is accepted once a worker has read and answered it (its log line exists);
    # every such request must have reached its client.
    dropped = [rid for rid, _ in load.failed if rid in logged]
    unaccepted = len(load.failed) - len(dropped)
    return {"requests": load.ok + len(load.failed), "completed": load.ok,
            "dropped": len(dropped), "unaccepted_resets": unaccepted,
            "refused_after_stop": load.refused, "exit_code": code, "drain_s": drain,
            "passed": code == 0 and not dropped}


def scenario_bad_tables() -> dict:
    folder = Path(tempfile.mkdtemp(prefix="annuity-tables-"))
    try:
        shutil.copytree(ROOT / "tables", folder, dirs_exist_ok=True)
        csv = folder / "data" / "fernhollow-2025-1-female.csv"
        lines = csv.read_text().splitlines()
        lines[5] = lines[5].split(",")[0] + ",1.5"  # q outside [0, 1]
        csv.write_text("\n".join(lines) + "\n")
        env = {"ANNUITY_TABLES_DIR": str(folder),
               "ANNUITY_REQUIRED_BASES": "standard-ultimate,fernhollow-annuitants@2025.1"}
        with running_service(workers=2, env=env) as (url, _):
            ready_status, ready_body = _get(url, "/readyz")
            ready = json.loads(ready_body)
            host, port = url.removeprefix("http://").split(":")
            conn = http.client.HTTPConnection(host, int(port), timeout=10)
            conn.request("POST", "/v1/annuity-factors", body=json.dumps(SINGLE),
                         headers={"Content-Type": "application/json"})
            served = conn.getresponse().status
            conn.close()
            _, bases = _get(url, "/v1/bases")
            loaded = {f"{b['id']}@{b['version']}" for b in json.loads(bases)["bases"]}
        reason = next((r for r in ready["refused"] if "fernhollow-annuitants-2025.1" in r), "")
        corrupt = {"readyz": ready_status, "reason": reason, "good_basis_served": served,
                   "bases_loaded": len(loaded),
                   "passed": ready_status == 503 and "1.5" in reason and served == 200
                   and "fernhollow-annuitants@2025.1" not in loaded and len(loaded) == 4}
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    env = os.environ | {"PORT": str(free_port()), "ANNUITY_TABLES_DIR": "/nonexistent/tables",
                        "WEB_CONCURRENCY": "1",
                        "PROMETHEUS_MULTIPROC_DIR": tempfile.mkdtemp(prefix="annuity-m-")}
    started = subprocess.run([str(GUNICORN), "--config", str(GUNICORN_CONF)],
                             cwd=ROOT, env=env, capture_output=True, text=True, timeout=60,
                             check=False)
    message = next((line for line in started.stderr.splitlines()
                    if "tables folder" in line), "")
    unreadable = {"exit_code": started.returncode, "message": message.strip(),
                  "passed": started.returncode != 0 and "/nonexistent/tables" in message}
    return {"corrupt": corrupt, "unreadable": unreadable}


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=60.0, help="length of the load run")
    parser.add_argument("--connections", type=int, default=32)
    args = parser.parse_args()
    print(f"load: {args.seconds:g} s at {args.connections} connections ...", flush=True)
    load = scenario_load(args.seconds, args.connections)
    print("worker SIGKILL under load ...", flush=True)
    kill = scenario_kill(min(20.0, args.seconds), args.connections)
    print("SIGTERM under load ...", flush=True)
    term = scenario_term(min(10.0, args.seconds), args.connections)
    print("start-up with bad tables ...", flush=True)
    bad = scenario_bad_tables()
    rows = [
        ("load held", f"{load['requests']} requests, {load['errors']} errors, "
                      f"p50 {load['p50_ms']:.1f} ms, p99 {load['p99_ms']:.1f} ms",
         load["passed"]),
        ("worker SIGKILL", f"{kill['requests']} requests, {kill['failed']} failed (bound "
                           f"{kill['in_flight_bound']} in flight), replaced: "
                           f"{kill['replaced']}", kill["passed"]),
        ("SIGTERM drain", f"{term['completed']} completed, {term['dropped']} accepted and "
                          f"dropped, {term['unaccepted_resets']} reset before acceptance, "
                          f"{term['refused_after_stop']} refused after stop, exit "
                          f"{term['exit_code']} in {term['drain_s']:.1f} s", term["passed"]),
        ("corrupt table", f"readyz {bad['corrupt']['readyz']}, good basis "
                          f"{bad['corrupt']['good_basis_served']}, "
                          f"{bad['corrupt']['bases_loaded']} bases loaded; "
                          f"{bad['corrupt']['reason']}", bad["corrupt"]["passed"]),
        ("unreadable tables", f"exit {bad['unreadable']['exit_code']}: "
                              f"{bad['unreadable']['message']}", bad["unreadable"]["passed"]),
    ]
    width = max(len(r[0]) for r in rows)
    print("\nFaults, measured")
    print(f"{'scenario'.ljust(width)}  result  figures")
    for name, figures, passed in rows:
        print(f"{name.ljust(width)}  {'PASS' if passed else 'FAIL'}    {figures}")
    return 0 if all(r[2] for r in rows) else 1


if __name__ == "__main__":
    sys.exit(main())
