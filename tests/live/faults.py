"""Faults, measured: load, a killed worker, a graceful stop, slow clients, heavy valuations and
bad tables at start-up.

    make faults                                   # about three minutes; a summary table at the end
    .venv/bin/python -m tests.live.faults --only slow,heavy       # some scenarios only
    .venv/bin/python -m tests.live.faults --help  # lengths, connections, the heavy request

Everything runs on loopback (127.0.0.1 only). The traffic scenarios run against the
production arrangement: nginx rendered from deploy/nginx/ in front of gunicorn with the
packaged configuration (tests/live/proxy.py; Debian's nginx is installed when missing, as in
CI). The graceful stop and the start-up faults are gunicorn's own and run against it directly.

Exits non-zero if any expectation fails: zero errors under load; a SIGKILLed worker replaced,
with no more failed requests than it had in flight; SIGTERM drains every request a worker
accepted and exits 0; with 64 slow-header and 16 slow-body connections held open, normal
requests keep a p99 under 1 s, no worker is killed and every probe is answered within 1 s;
with the heaviest accepted valuation running on every worker at once, every probe is
answered within 1 s and no worker is killed; a corrupt table is refused while the rest are
served and readiness reports it; an unreadable tables folder stops start-up with a clear
message and a non-zero exit.
"""

import argparse
import http.client
import json
import math
import os
import random
import re
import select
import shutil
import signal
import socket
import statistics
import subprocess
import sys
import tempfile
import threading
import time
import uuid
from pathlib import Path

from service.serving import GUNICORN_CONF
from tests.live.proxy import ensure_nginx, running_production
from tests.live.server import GUNICORN, ROOT, free_port, gunicorn_settings, running_service

SINGLE = {"basis": "fernhollow-annuitants", "items": [
    {"lives": [{"age": 65.5, "sex": "female"}], "timing": "advance", "frequency": 12,
     "guarantee": 5}]}
#: A probe must be answered (200) within this many seconds: Kubernetes' default timeout.
PROBE_TIMEOUT = 1.0
#: Normal requests' p99 must stay under this while slow clients hold connections.
SLOW_P99_LIMIT = 1.0


def _batch(n: int, rng: random.Random) -> dict:
    return {"basis": "standard-ultimate", "items": [
        {"lives": [{"age": round(rng.uniform(50, 90), 2)}], "timing": rng.choice(
            ["advance", "arrears", "continuous"]), "frequency": 12, "escalation": 0.02}
        for _ in range(n)]}


def _host_port(url: str) -> tuple[str, int]:
    host, port = url.removeprefix("http://").split(":")
    return host, int(port)


class Load:
    """Concurrent clients posting mixed single and batch requests until stopped."""

    def __init__(self, url: str, connections: int, seed: int = 7):
        self.host, self.port = _host_port(url)
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
            conn = http.client.HTTPConnection(self.host, self.port, timeout=60)
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
        return _percentile(self.latencies, p)


def _percentile(values: list[float], p: float) -> float:
    data = sorted(values)
    if not data:
        return float("nan")
    return data[min(len(data) - 1, int(p / 100 * len(data)))]


class Probes:
    """Health probes as the kubelet sends the pod's: GET, in turn the service's /livez and
    /readyz through the proxy and the proxy's own /livez, a fixed period, a 1 s timeout; each
    counts as answered only with a 200 within the timeout."""

    def __init__(self, proxy, period: float = 0.5, timeout: float = PROBE_TIMEOUT):
        self.urls = [proxy.url + "/livez", proxy.url + "/readyz", proxy.health_url]
        self.period = period
        self.timeout = timeout
        self.stop = threading.Event()
        self.results: list[tuple[str, int, float]] = []  # (url, status or 0, seconds)
        self.thread = threading.Thread(target=self._run, daemon=True)

    def start(self):
        self.thread.start()
        return self

    def finish(self):
        self.stop.set()
        self.thread.join(timeout=10)

    def _run(self):
        n = 0
        while not self.stop.is_set():
            url = self.urls[n % len(self.urls)]
            n += 1
            host, port = _host_port(url.rsplit("/", 1)[0])
            path = "/" + url.rsplit("/", 1)[1]
            t0 = time.perf_counter()
            conn = http.client.HTTPConnection(host, port, timeout=self.timeout)
            try:
                conn.request("GET", path)
                response = conn.getresponse()
                response.read()
                status = response.status
            except (OSError, http.client.HTTPException):
                status = 0
            finally:
                conn.close()
            elapsed = time.perf_counter() - t0
            self.results.append((url, status, elapsed))
            self.stop.wait(max(0.0, self.period - elapsed))

    @property
    def answered(self) -> int:
        return sum(1 for _, status, s in self.results if status == 200 and s <= self.timeout)

    @property
    def slowest(self) -> float:
        return max((s for _, _, s in self.results), default=float("nan"))

    def passed(self) -> bool:
        return bool(self.results) and self.answered == len(self.results)

    def figures(self) -> str:
        return (f"{self.answered}/{len(self.results)} probes answered within "
                f"{self.timeout:g} s (slowest {self.slowest * 1000:.0f} ms)")


class SlowClients:
    """Connections that send their request slowly and are reopened whenever the server cuts
    them: ``headers`` connections send a request header one byte every ``header_every``
    seconds; ``bodies`` connections send a whole header announcing a body of
    ``body_length`` bytes, then one byte of it every ``body_every`` seconds."""

    def __init__(self, url: str, *, headers: int, bodies: int, header_every: float = 5.0,
                 body_every: float = 2.0, body_length: int = 4_000_000):
        self.host, self.port = _host_port(url)
        self.stop = threading.Event()
        self.lock = threading.Lock()
        self.cut: dict[str, list[float]] = {"header": [], "body": []}  # seconds held
        self.open_at_end: dict[str, int] = {"header": 0, "body": 0}
        self.connect_failures = 0
        head = (f"GET /livez HTTP/1.1\r\nHost: {self.host}\r\nUser-Agent: slow\r\n"
                "X-Padding: " + "a" * 200 + "\r\n\r\n").encode()
        body_head = (f"POST /v1/annuity-factors HTTP/1.1\r\nHost: {self.host}\r\n"
                     f"Content-Type: application/json\r\nContent-Length: {body_length}\r\n"
                     "\r\n").encode()
        self.threads = (
            [threading.Thread(target=self._run, args=("header", b"", head, header_every),
                              daemon=True) for _ in range(headers)]
            + [threading.Thread(target=self._run, args=("body", body_head, None, body_every),
                                daemon=True) for _ in range(bodies)])
        self.body_length = body_length

    def start(self):
        for n, t in enumerate(self.threads):
            t.start()
            if n % 16 == 15:
                time.sleep(0.05)
        return self

    def finish(self):
        self.stop.set()
        for t in self.threads:
            t.join(timeout=30)

    def _run(self, kind: str, first: bytes, drip: bytes | None, every: float):
        """Send ``first`` at once, then ``drip`` (or the body's bytes) one byte at a time."""
        while not self.stop.is_set():
            try:
                sock = socket.create_connection((self.host, self.port), timeout=5)
            except OSError:
                with self.lock:
                    self.connect_failures += 1
                self.stop.wait(0.5)
                continue
            opened = time.monotonic()
            cut = False
            try:
                if first:
                    sock.sendall(first)
                sent = 0
                length = len(drip) if drip is not None else self.body_length
                while not self.stop.is_set() and not cut and sent < length:
                    sock.sendall(drip[sent:sent + 1] if drip is not None else b" ")
                    sent += 1
                    deadline = time.monotonic() + every
                    while not self.stop.is_set() and time.monotonic() < deadline:
                        # Readable means the server answered or closed: either way, cut.
                        readable, _, _ = select.select([sock], [], [], 0.25)
                        if readable:
                            cut = True
                            break
            except OSError:
                cut = True
            finally:
                sock.close()
            with self.lock:
                if cut:
                    self.cut[kind].append(time.monotonic() - opened)
                else:
                    self.open_at_end[kind] += 1


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
    host, port = _host_port(url)
    conn = http.client.HTTPConnection(host, port, timeout=10)
    try:
        conn.request("GET", path)
        response = conn.getresponse()
        return response.status, response.read()
    finally:
        conn.close()


def _post(url: str, body: bytes, timeout: float = 300.0) -> tuple[int, bytes, float]:
    host, port = _host_port(url)
    conn = http.client.HTTPConnection(host, port, timeout=timeout)
    t0 = time.perf_counter()
    try:
        conn.request("POST", "/v1/annuity-factors", body=body,
                     headers={"Content-Type": "application/json"})
        response = conn.getresponse()
        return response.status, response.read(), time.perf_counter() - t0
    except (OSError, http.client.HTTPException) as exc:
        return 0, type(exc).__name__.encode(), time.perf_counter() - t0
    finally:
        conn.close()


def scenario_load(seconds: float, connections: int) -> dict:
    with running_production(workers=4) as (proxy, _, _):
        load = Load(proxy.url, connections).start()
        time.sleep(seconds)
        load.finish()
    return {"requests": load.ok + len(load.failed), "errors": len(load.failed) + load.refused,
            "p50_ms": load.percentile(50) * 1000, "p99_ms": load.percentile(99) * 1000,
            "passed": not load.failed and load.refused == 0 and load.ok > 0}


def scenario_kill(seconds: float, connections: int) -> dict:
    with running_production(workers=4) as (proxy, _, proc):
        before = _wait_workers(proc.pid, 4)
        load = Load(proxy.url, connections).start()
        time.sleep(seconds / 2)
        victim = sorted(before)[0]
        os.kill(victim, signal.SIGKILL)
        time.sleep(seconds / 2)
        load.finish()
        after = _wait_workers(proc.pid, len(before))
    replaced = len(after) == len(before) and victim not in after
    # A worker takes at most as many connections as it has threads: at most that many
    # requests can be lost with it.
    in_flight_bound = gunicorn_settings({"WEB_CONCURRENCY": "4"})["worker_connections"]
    return {"requests": load.ok + len(load.failed), "failed": len(load.failed),
            "in_flight_bound": in_flight_bound, "replaced": replaced,
            "passed": replaced and len(load.failed) <= in_flight_bound and load.refused == 0}


def scenario_slow_clients(seconds: float, headers: int, bodies: int, connections: int) -> dict:
    log_path = Path(tempfile.mkstemp(prefix="annuity-slow-", suffix=".log")[1])
    with log_path.open("wb") as log, \
            running_production(workers=4, log=log) as (proxy, _, proc):
        before = _wait_workers(proc.pid, 4)
        slow = SlowClients(proxy.url, headers=headers, bodies=bodies).start()
        time.sleep(1.0)  # every slow connection open before the clock starts
        probes = Probes(proxy).start()
        load = Load(proxy.url, connections).start()
        time.sleep(seconds)
        load.finish()
        probes.finish()
        slow.finish()
        after = _workers(proc.pid)
    timeouts = log_path.read_text(errors="replace").count("WORKER TIMEOUT")
    log_path.unlink()
    p99 = load.percentile(99)
    header_cuts = slow.cut["header"]
    return {
        "requests": load.ok + len(load.failed), "errors": len(load.failed) + load.refused,
        "p50_ms": load.percentile(50) * 1000, "p99_ms": p99 * 1000,
        "probes": probes.figures(), "workers_killed": len(before - after) + timeouts,
        "header_cut": len(header_cuts),
        "header_held_s": statistics.median(header_cuts) if header_cuts else float("nan"),
        "bodies_held": slow.open_at_end["body"], "bodies_cut": len(slow.cut["body"]),
        "connect_failures": slow.connect_failures,
        "passed": (load.ok > 0 and not load.failed and load.refused == 0
                   and p99 < SLOW_P99_LIMIT and before == after and timeouts == 0
                   and probes.passed()),
    }


_NUMBERS = re.compile(r"\d+")


def _heavy_body(items: int, args) -> bytes:
    return json.dumps({"basis": args.heavy_basis, "items": [
        {"lives": [{"age": args.heavy_age}], "timing": args.heavy_timing,
         "frequency": args.heavy_frequency, "escalation": round(0.0001 * (k % 50), 4)}
        for k in range(items)]}).encode()


def heaviest_request(url: str, args) -> tuple[int, bytes, float]:
    """The largest batch of the configured item that the service accepts: start from
    --heavy-items and shrink by what each 413 says (needed versus allowed work)."""
    items = args.heavy_items
    for _ in range(8):
        body = _heavy_body(items, args)
        status, payload, seconds = _post(url, body)
        if status != 413:
            if status != 200:
                raise RuntimeError(f"the heavy request got HTTP {status}: {payload[:300]!r}")
            return items, body, seconds
        problem = json.loads(payload)
        if "items" in (problem.get("errors") or {}):  # more items than a batch may hold
            numbers = [int(x) for x in _NUMBERS.findall(problem["detail"])]
            items = min(numbers)
            continue
        numbers = [int(x) for x in _NUMBERS.findall(problem.get("detail", ""))]
        if len(numbers) >= 2 and numbers[0] > numbers[1] > 0:
            needed, allowed = numbers[0], numbers[1]
            items = max(1, min(items - 1, math.floor(items * allowed / needed)))
        else:
            items = max(1, items * 3 // 4)
    raise RuntimeError("no accepted heavy request found in 8 tries")


def scenario_heavy(args) -> dict:
    log_path = Path(tempfile.mkstemp(prefix="annuity-heavy-", suffix=".log")[1])
    with log_path.open("wb") as log, \
            running_production(workers=args.heavy_clients, log=log) as (proxy, _, proc):
        before = _wait_workers(proc.pid, args.heavy_clients)
        items, body, alone = heaviest_request(proxy.url, args)
        answers: list[tuple[int, float]] = []

        def client():
            for _ in range(args.heavy_rounds):
                status, _, seconds = _post(proxy.url, body)
                answers.append((status, seconds))

        clients = [threading.Thread(target=client, daemon=True)
                   for _ in range(args.heavy_clients)]
        probes = Probes(proxy).start()
        load = Load(proxy.url, args.heavy_load_connections).start() \
            if args.heavy_load_connections else None
        for t in clients:
            t.start()
        for t in clients:
            t.join()
        if load:
            load.finish()
        probes.finish()
        after = _workers(proc.pid)
    timeouts = log_path.read_text(errors="replace").count("WORKER TIMEOUT")
    log_path.unlink()
    ok = sum(1 for status, _ in answers if status == 200)
    return {
        "items": items, "alone_s": alone, "bytes": len(body), "answers": len(answers),
        "ok": ok, "slowest_s": max((s for _, s in answers), default=float("nan")),
        "probes": probes.figures(), "workers_killed": len(before - after) + timeouts,
        "load": (f"; meanwhile {load.ok} normal requests, {len(load.failed)} errors, "
                 f"p99 {load.percentile(99) * 1000:.0f} ms") if load else "",
        "passed": (ok == len(answers) == args.heavy_clients * args.heavy_rounds
                   and probes.passed() and before == after and timeouts == 0
                   and (load is None or not load.failed)),
    }


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
            host, port = _host_port(url)
            conn = http.client.HTTPConnection(host, port, timeout=10)
            conn.request("POST", "/v1/annuity-factors", body=json.dumps(SINGLE),
                         headers={"Content-Type": "application/json"})
            served = conn.getresponse().status
            conn.close()
            _, bases = _get(url, "/v1/bases")
            loaded = {f"{b['id']}@{b['version']}" for b in json.loads(bases)["bases"]}
        reason = next((r for r in ready["refused"] if "fernhollow-annuitants-2025.1" in r), "")
        corrupt = {"readyz": ready_status, "reason": reason, "good_basis_served": served,
                   "bases_loaded": len(loaded),
                   "passed": ready_status == 503 and "outside [0, 1]" in reason and served == 200
                   and "fernhollow-annuitants@2025.1" not in loaded
                   and len(loaded) == len(list(folder.glob("*.toml"))) - 1}
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


SCENARIOS = ("load", "kill", "term", "slow", "heavy", "tables")


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--only", default=",".join(SCENARIOS),
                        help=f"comma-separated scenarios to run (default: all of "
                             f"{','.join(SCENARIOS)})")
    parser.add_argument("--seconds", type=float, default=60.0, help="length of the load run")
    parser.add_argument("--connections", type=int, default=32)
    slow = parser.add_argument_group("slow clients")
    slow.add_argument("--slow-seconds", type=float, default=30.0)
    slow.add_argument("--slow-headers", type=int, default=64,
                      help="connections sending headers one byte every 5 s")
    slow.add_argument("--slow-bodies", type=int, default=16,
                      help="connections sending a 4,000,000-byte body one byte every 2 s")
    slow.add_argument("--slow-load-connections", type=int, default=8,
                      help="connections of normal traffic meanwhile")
    heavy = parser.add_argument_group(
        "heavy valuations", "the heavy request is a batch of one item repeated (escalation "
        "varied); its item count starts at --heavy-items and shrinks to the largest the "
        "service accepts (by what its 413 says)")
    heavy.add_argument("--heavy-clients", type=int, default=4,
                       help="heavy requests at once (also the number of workers)")
    heavy.add_argument("--heavy-rounds", type=int, default=1,
                       help="heavy requests each client sends in turn")
    heavy.add_argument("--heavy-basis", default="standard-ultimate")
    heavy.add_argument("--heavy-age", type=float, default=20.0)
    heavy.add_argument("--heavy-frequency", type=int, default=52)
    heavy.add_argument("--heavy-timing", default="advance")
    heavy.add_argument("--heavy-items", type=int, default=10_000)
    heavy.add_argument("--heavy-load-connections", type=int, default=2,
                       help="connections of normal traffic meanwhile (0: none)")
    args = parser.parse_args()
    only = {name.strip() for name in args.only.split(",") if name.strip()}
    unknown = only - set(SCENARIOS)
    if unknown:
        parser.error(f"unknown scenarios: {', '.join(sorted(unknown))}")
    if only & {"load", "kill", "slow", "heavy"}:
        ensure_nginx()
    rows = []
    if "load" in only:
        print(f"load: {args.seconds:g} s at {args.connections} connections, through the "
              "proxy ...", flush=True)
        load = scenario_load(args.seconds, args.connections)
        rows.append(("load held", f"{load['requests']} requests, {load['errors']} errors, "
                                  f"p50 {load['p50_ms']:.1f} ms, p99 {load['p99_ms']:.1f} ms",
                     load["passed"]))
    if "kill" in only:
        print("worker SIGKILL under load ...", flush=True)
        kill = scenario_kill(min(20.0, args.seconds), args.connections)
        rows.append(("worker SIGKILL", f"{kill['requests']} requests, {kill['failed']} failed "
                                       f"(bound {kill['in_flight_bound']} in flight), "
                                       f"replaced: {kill['replaced']}", kill["passed"]))
    if "term" in only:
        print("SIGTERM under load ...", flush=True)
        term = scenario_term(min(10.0, args.seconds), args.connections)
        rows.append(("SIGTERM drain", f"{term['completed']} completed, {term['dropped']} "
                                      f"accepted and dropped, {term['unaccepted_resets']} reset "
                                      f"before acceptance, {term['refused_after_stop']} refused "
                                      f"after stop, exit {term['exit_code']} in "
                                      f"{term['drain_s']:.1f} s", term["passed"]))
    if "slow" in only:
        print(f"slow clients: {args.slow_headers} slow-header and {args.slow_bodies} slow-body "
              f"connections for {args.slow_seconds:g} s ...", flush=True)
        sl = scenario_slow_clients(args.slow_seconds, args.slow_headers, args.slow_bodies,
                                   args.slow_load_connections)
        rows.append(("slow clients",
                     f"{args.slow_headers} slow-header + {args.slow_bodies} slow-body held "
                     f"{args.slow_seconds:g} s: {sl['requests']} normal requests, "
                     f"{sl['errors']} errors, p50 {sl['p50_ms']:.1f} ms, p99 "
                     f"{sl['p99_ms']:.1f} ms (limit {SLOW_P99_LIMIT * 1000:.0f}); "
                     f"{sl['probes']}; workers killed {sl['workers_killed']}; "
                     f"{sl['header_cut']} slow headers cut by the proxy after "
                     f"{sl['header_held_s']:.1f} s (median) and reopened; "
                     f"{sl['bodies_held']} slow bodies still held by the proxy at the end, "
                     f"{sl['bodies_cut']} cut", sl["passed"]))
    if "heavy" in only:
        print(f"heavy valuations: {args.heavy_clients} of the heaviest accepted request at "
              "once, probes meanwhile ...", flush=True)
        hv = scenario_heavy(args)
        rows.append(("heavy valuations",
                     f"{hv['items']} items x {args.heavy_frequency}/yr whole life from "
                     f"{args.heavy_age:g} ({hv['bytes']} bytes; alone {hv['alone_s']:.1f} s); "
                     f"{hv['ok']}/{hv['answers']} answered at once, slowest "
                     f"{hv['slowest_s']:.1f} s; {hv['probes']}; workers killed "
                     f"{hv['workers_killed']}{hv['load']}", hv["passed"]))
    if "tables" in only:
        print("start-up with bad tables ...", flush=True)
        bad = scenario_bad_tables()
        rows.append(("corrupt table", f"readyz {bad['corrupt']['readyz']}, good basis "
                                      f"{bad['corrupt']['good_basis_served']}, "
                                      f"{bad['corrupt']['bases_loaded']} bases loaded; "
                                      f"{bad['corrupt']['reason']}", bad["corrupt"]["passed"]))
        rows.append(("unreadable tables", f"exit {bad['unreadable']['exit_code']}: "
                                          f"{bad['unreadable']['message']}",
                     bad["unreadable"]["passed"]))
    width = max(len(r[0]) for r in rows)
    print("\nFaults, measured")
    print(f"{'scenario'.ljust(width)}  result  figures")
    for name, figures, passed in rows:
        print(f"{name.ljust(width)}  {'PASS' if passed else 'FAIL'}    {figures}")
    return 0 if all(r[2] for r in rows) else 1


if __name__ == "__main__":
    sys.exit(main())
