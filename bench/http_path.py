"""The HTTP path through the production configuration (issue 11, figures 4 and 5).

Two gunicorn servers are started with service/serving/gunicorn.conf.py, each on a free
loopback port: the service, and bench/echo_app.py (a minimal Flask app that answers its
JSON body). Both are stopped at the end.

- Figure 4: a 10,000-item POST /v1/annuity-factors, its round trip measured by the client
  (send the body, read the whole answer), against the time to parse and serialise the same
  request and response JSON in this process (json.loads and json.dumps of both bodies).
  Target: at most 3x.
- Figure 5: single-factor requests at 1, 4 and 16 connections, the service against the echo
  app (the same body POSTed): throughput at least 0.6x the echo's, and p99 latency at most
  2x the echo's. The load comes from wrk (Debian's package, a Lua script POSTs the body;
  C, so the client costs little of the 2 CPUs it shares with the servers); without wrk, a
  Python client of threads (one connection per request, as the configuration keeps no
  connection alive), which costs more CPU and reads lower for both sides alike.

Each pair is run in turn (round robin), median of the repeats.

    .venv/bin/python -m bench.run --only http [--repeats R]
    .venv/bin/python -m bench.http_path --profile   # where a 10,000-item request's time goes
    .venv/bin/python -m bench.http_path --profile-single 2>/dev/null   # a single factor's
"""

import contextlib
import http.client
import json
import logging
import math
import os
import re
import shutil
import socket
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

from bench.common import ROOT, Figure, Section, median, table, verdict

CONFIG = ROOT / "service" / "serving" / "gunicorn.conf.py"
LUA = Path(__file__).with_name("wrk_post.lua")
BATCH_ITEMS = 10_000
BATCH_TARGET = 3.0
THROUGHPUT_TARGET = 0.6  # the service's throughput at least this share of the echo's
P99_TARGET = 2.0
CONNECTIONS = (1, 4, 16)
#: Seconds of load per run of wrk (each connection count, each app, each repeat).
LOAD_SECONDS = 2
SINGLE = {"basis": "standard-ultimate",
          "items": [{"lives": [{"age": 65.5}], "timing": "advance", "frequency": 12}]}


def batch_body(n: int = BATCH_ITEMS, seed: int = 2026) -> dict:
    """``n`` single-life items under standard-ultimate, each with an id: 30% monthly whole
    life guaranteed 5 years, 25% monthly temporary, 25% monthly deferred in arrears, 20%
    continuous escalating at 2%."""
    rng = np.random.default_rng(seed)
    shape = rng.choice(4, n, p=[0.30, 0.25, 0.25, 0.20])
    ages = rng.uniform(40, 90, n).round(2)
    items = []
    for k in range(n):
        item = {"id": f"policy-{k:06d}", "lives": [{"age": float(ages[k])}]}
        if shape[k] == 0:
            item |= {"timing": "advance", "frequency": 12, "guarantee": 5.0}
        elif shape[k] == 1:
            item |= {"timing": "advance", "frequency": 12, "term": float(5 + k % 26)}
        elif shape[k] == 2:
            item["lives"][0]["age"] = min(item["lives"][0]["age"], 64.0)
            item |= {"timing": "arrears", "frequency": 12, "deferral": float(1 + k % 25)}
        else:
            item |= {"timing": "continuous", "escalation": 0.02}
        items.append(item)
    return {"basis": "standard-ultimate", "items": items}


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@contextlib.contextmanager
def gunicorn(app: str | None, check_path: str, check_body: bytes):
    """A gunicorn with the production configuration on a free loopback port (``app`` None:
    the service itself); yields the port; stops it (SIGTERM, then waits) afterwards."""
    port = _free_port()
    env = os.environ | {"HOST": "127.0.0.1", "PORT": str(port), "LOG_LEVEL": "warning"}
    env.pop("PROMETHEUS_MULTIPROC_DIR", None)  # the configuration makes its own
    command = [sys.executable, "-m", "gunicorn", "-c", str(CONFIG), *([app] if app else [])]
    proc = subprocess.Popen(command, cwd=ROOT, env=env, stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    try:
        deadline = time.monotonic() + 60
        while True:
            try:
                status, _ = post(port, check_path, check_body)
                if status == 200:
                    break
            except OSError:
                pass
            if proc.poll() is not None or time.monotonic() > deadline:
                raise RuntimeError(f"gunicorn ({app or 'the service'}) did not start")
            time.sleep(0.2)
        yield port
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=40)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()


def post(port: int, path: str, body: bytes) -> tuple[int, bytes]:
    """POST ``body`` as JSON on a new connection; return the status and the whole answer."""
    conn = http.client.HTTPConnection("127.0.0.1", port, timeout=120)
    try:
        conn.request("POST", path, body, {"Content-Type": "application/json"})
        response = conn.getresponse()
        return response.status, response.read()
    finally:
        conn.close()


_UNITS = {"us": 1e-6, "ms": 1e-3, "s": 1.0, "m": 60.0}


def _wrk(port: int, path: str, body_file: str, connections: int) -> tuple[float, float]:
    """Requests per second and p99 latency (s) of ``LOAD_SECONDS`` of wrk."""
    out = subprocess.run(
        ["wrk", f"-t{min(connections, 2)}", f"-c{connections}", f"-d{LOAD_SECONDS}s",
         "--latency", "-s", str(LUA), f"http://127.0.0.1:{port}{path}"],
        env=os.environ | {"BODY": body_file}, capture_output=True, text=True, check=True).stdout
    if re.search(r"Non-2xx or 3xx responses", out):
        raise RuntimeError(f"wrk saw failed requests:\n{out}")
    rate = float(re.search(r"Requests/sec:\s+([\d.]+)", out).group(1))
    number, unit = re.search(r"^\s+99%\s+([\d.]+)(us|ms|s|m)\s*$", out, re.M).groups()
    return rate, float(number) * _UNITS[unit]


def _threads(port: int, path: str, body: bytes, connections: int) -> tuple[float, float]:
    """The same measurement with Python threads, one connection per request."""
    stop = time.perf_counter() + LOAD_SECONDS
    latencies: list[list[float]] = [[] for _ in range(connections)]

    def worker(mine):
        while time.perf_counter() < stop:
            t0 = time.perf_counter()
            status, _ = post(port, path, body)
            if status != 200:
                raise RuntimeError(f"status {status}")
            mine.append(time.perf_counter() - t0)

    started = time.perf_counter()
    threads = [threading.Thread(target=worker, args=(m,)) for m in latencies]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    every = np.concatenate([np.asarray(m) for m in latencies])
    return every.size / (time.perf_counter() - started), float(np.quantile(every, 0.99))


def _load(port, path, body: bytes, body_file: str, connections: int):
    if shutil.which("wrk"):
        return _wrk(port, path, body_file, connections)
    return _threads(port, path, body, connections)


def _json_floor(request: bytes, answer: bytes) -> float:
    """Seconds to parse and serialise the request and the answer with the json module."""
    t0 = time.perf_counter()
    json.dumps(json.loads(request), separators=(",", ":"))
    json.dumps(json.loads(answer), separators=(",", ":"))
    return time.perf_counter() - t0


def run(repeats: int = 5) -> Section:
    batch = json.dumps(batch_body()).encode()
    single = json.dumps(SINGLE).encode()
    figures, lines = [], []
    with tempfile.NamedTemporaryFile("wb", suffix=".json") as body_file, \
            gunicorn(None, "/v1/annuity-factors", single) as service, \
            gunicorn("bench.echo_app:app", "/", single) as echo:
        body_file.write(single)
        body_file.flush()
        # Figure 4: the batch round trip against parsing and serialising its JSON.
        status, answer = post(service, "/v1/annuity-factors", batch)  # warm every worker
        assert status == 200, answer[:500]
        assert len(json.loads(answer)["results"]) == BATCH_ITEMS
        trips, floors = [], []
        for _ in range(repeats):
            t0 = time.perf_counter()
            status, answer = post(service, "/v1/annuity-factors", batch)
            trips.append(time.perf_counter() - t0)
            assert status == 200
            floors.append(_json_floor(batch, answer))
        f4 = Figure(f"http: {BATCH_ITEMS:,}-item batch, client round trip / json parse and "
                    "serialise of request and answer", median(trips), "s",
                    floor=min(floors), target=BATCH_TARGET)
        figures.append(f4)
        lines += [f"A {BATCH_ITEMS:,}-item POST /v1/annuity-factors ({len(batch) / 2**20:.1f} "
                  f"MiB; the answer {len(answer) / 2**20:.1f} MiB) through gunicorn with the "
                  f"production configuration: round trip {f4.value:.3f} s "
                  f"({f4.value / BATCH_ITEMS * 1e6:.1f} µs per item), median of {repeats}; "
                  f"json.loads and json.dumps of both bodies {f4.floor:.4f} s (the least of "
                  f"{repeats}): **{f4.ratio:.1f}x**, target at most {BATCH_TARGET:g}x: "
                  f"{verdict(f4.met)}.", ""]
        # Figure 5: single factors against the echo app, side by side.
        tool = "wrk" if shutil.which("wrk") else "Python threads (wrk not installed)"
        rows = []
        for c in CONNECTIONS:
            got = {"service": [], "echo": []}
            for _ in range(repeats):
                got["service"].append(_load(service, "/v1/annuity-factors", single,
                                            body_file.name, c))
                got["echo"].append(_load(echo, "/", single, body_file.name, c))
            rate = {k: median([r for r, _ in v]) for k, v in got.items()}
            p99 = {k: median([p for _, p in v]) for k, v in got.items()}
            # As time per request, so that "ratio at most target" reads as for the others.
            thr = Figure(f"http: single factor, {c} connections: time per request (1 / "
                         "throughput) / the echo app's", 1 / rate["service"], "s",
                         floor=1 / rate["echo"], target=1 / THROUGHPUT_TARGET)
            lat = Figure(f"http: single factor, {c} connections: p99 latency / the echo "
                         "app's", p99["service"], "s", floor=p99["echo"], target=P99_TARGET)
            figures += [thr, lat]
            rows.append([str(c), f"{rate['service']:,.0f}", f"{rate['echo']:,.0f}",
                         f"{rate['service'] / rate['echo']:.2f} ({verdict(thr.met)})",
                         f"{p99['service'] * 1e3:.1f}", f"{p99['echo'] * 1e3:.1f}",
                         f"{lat.ratio:.2f} ({verdict(lat.met)})"])
    lines += [f"Single-factor requests ({len(single)} bytes) for {LOAD_SECONDS} s per run, "
              f"service and echo app in turn, median of {repeats} runs; load from {tool}. "
              f"Targets: throughput at least {THROUGHPUT_TARGET:g}x the echo's, p99 at most "
              f"{P99_TARGET:g}x (in latest.json as time per request over the echo's, at most "
              f"{1 / THROUGHPUT_TARGET:.3g}).", "",
              *table(["connections", "service req/s", "echo req/s", "throughput ratio",
                      "service p99 (ms)", "echo p99 (ms)", "p99 ratio"], rows), ""]
    return Section("HTTP through the production configuration (issue 11, figures 4 and 5)",
                   lines, figures)


# ---- profile: where a 10,000-item request's time goes ---------------------------------------


def profile(repeats: int = 5) -> str:
    """Time the stages of a 10,000-item request through the Flask test client (wrapping the
    view module's functions; what is left is building the results and the framework)."""
    from service import create_app
    from service.api import views

    spent: dict[str, float] = {}
    inside: set[str] = set()  # a stage called within its own label is counted once

    timed = _timer(spent, inside)

    def timed_stage(name, label):
        original = getattr(views, name)
        setattr(views, name, timed(original, label))
        return original

    stages = {"json_body": "parse the body", "_load_whole": "load and validate the items",
              "load": "load and validate the items", "_engine_items": "engine items",
              "_column_items": "engine items",
              "_value_batch": "engine", "request_warnings": "warnings",
              "_results_json": "serialise the answer", "jsonify": "serialise the answer"}
    originals = {name: timed_stage(name, label) for name, label in stages.items()
                 if hasattr(views, name)}
    app = create_app()
    logging.disable(logging.INFO)
    client = app.test_client()
    body = json.dumps(batch_body()).encode()
    runs = []
    try:
        for k in range(repeats + 1):
            spent.clear()
            t0 = time.perf_counter()
            response = client.post("/v1/annuity-factors", data=body,
                                   content_type="application/json")
            response.get_data()
            total = time.perf_counter() - t0
            assert response.status_code == 200
            if k:  # the first warms the caches
                runs.append((total, dict(spent)))
    finally:
        for name, original in originals.items():
            setattr(views, name, original)
        logging.disable(logging.NOTSET)
    total = median([t for t, _ in runs])
    shares = {label: median([s.get(label, 0.0) for _, s in runs])
              for label in dict.fromkeys(stages.values())}
    shares["results and the rest"] = total - sum(shares.values())
    rows = [[label, f"{s:.3f}", f"{100 * s / total:.0f}%"] for label, s in shares.items()]
    return "\n".join([f"{BATCH_ITEMS:,}-item request through the Flask test client: "
                      f"{total:.3f} s (median of {repeats})", "",
                      *table(["stage", "seconds", "share"], rows)])


def _timer(spent: dict[str, float], inside: set[str]):
    """``timed(original, label)``: ``original`` wrapped to add its seconds to
    ``spent[label]`` (a stage called within its own label is counted once)."""

    def timed(original, label):
        def stage(*args, **kwargs):
            if label in inside:
                return original(*args, **kwargs)
            inside.add(label)
            t0 = time.perf_counter()
            try:
                return original(*args, **kwargs)
            finally:
                inside.discard(label)
                spent[label] = spent.get(label, 0.0) + time.perf_counter() - t0

        return stage

    return timed


def profile_single(requests: int = 500, blocks: int = 7) -> str:
    """Time the stages of a single-factor request (``SINGLE``) through the Flask test client,
    the access log on (written to stderr) as in production; the least of ``blocks`` blocks of
    ``requests`` requests, beside the echo app's request through the same client."""
    from flask import Flask, jsonify, request

    from service import create_app
    from service.api import views

    spent: dict[str, float] = {}
    inside: set[str] = set()

    timed = _timer(spent, inside)

    stages = {"json_body": "parse the body", "_load_whole": "load and validate",
              "_basis": "basis, interest, audit record", "_valuation":
                  "basis, interest, audit record", "_dates_needed": "basis, interest, audit record",
              "_column_items": "engine items", "_engine_items": "engine items",
              "value_annuities": "engine", "request_warnings": "warnings",
              "audit_block": "audit block, dump, encode", "dump": "audit block, dump, encode",
              "_results_json": "audit block, dump, encode", "_wants_csv": "Accept header"}
    originals = {name: getattr(views, name) for name in stages}
    app = create_app()
    hooks = {key: list(funcs) for key, funcs in app.before_request_funcs.items()}, \
        {key: list(funcs) for key, funcs in app.after_request_funcs.items()}
    bookkeeping = "request id, metrics, access log"
    for funcs_of in (app.before_request_funcs, app.after_request_funcs):
        for key, funcs in funcs_of.items():
            funcs_of[key] = [timed(f, bookkeeping) for f in funcs]
    echo = Flask("echo")
    echo.post("/")(lambda: jsonify(request.get_json()))
    body = json.dumps(SINGLE).encode()

    def best(client, path):
        least, at = math.inf, {}
        for _ in range(blocks + 1):
            spent.clear()
            t0 = time.perf_counter()
            for _ in range(requests):
                response = client.post(path, data=body, content_type="application/json")
                assert response.status_code == 200
            total = (time.perf_counter() - t0) / requests
            if total < least:
                least, at = total, {k: v / requests for k, v in spent.items()}
        return least, at

    try:
        for name, label in stages.items():
            setattr(views, name, timed(originals[name], label))
        total, shares = best(app.test_client(), "/v1/annuity-factors")
    finally:
        for name, original in originals.items():
            setattr(views, name, original)
        app.before_request_funcs.update(hooks[0])
        app.after_request_funcs.update(hooks[1])
    floor, _ = best(echo.test_client(), "/")
    labels = [*dict.fromkeys(stages.values()), bookkeeping]
    rows = [[label, f"{shares.get(label, 0.0) * 1e6:.0f}",
             f"{100 * shares.get(label, 0.0) / total:.0f}%"] for label in labels]
    rest = total - sum(shares.get(label, 0.0) for label in labels)
    rows.append(["Flask, the test client, the view's own code", f"{rest * 1e6:.0f}",
                 f"{100 * rest / total:.0f}%"])
    return "\n".join([f"Single-factor request through the Flask test client: {total * 1e6:.0f} µs "
                      f"(the least of {blocks} blocks of {requests}); the echo app's "
                      f"{floor * 1e6:.0f} µs", "",
                      *table(["stage", "µs", "share"], rows)])


if __name__ == "__main__":
    if "--profile-single" in sys.argv:
        print(profile_single())
    elif "--profile" in sys.argv:
        print(profile())
    else:
        print(run(int(sys.argv[1]) if len(sys.argv) > 1 else 5).markdown())
