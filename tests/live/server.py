"""Start the real gunicorn service on a free loopback port, for live tests and scripts."""

import contextlib
import os
import signal
import socket
import subprocess
import sys
import tempfile
import time
import urllib.request
from pathlib import Path

from service.serving import GUNICORN_CONF

ROOT = Path(__file__).resolve().parents[2]
GUNICORN = Path(sys.executable).with_name("gunicorn")


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def wait_ready(url: str, timeout: float = 30.0, path: str = "/livez") -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            with urllib.request.urlopen(url + path, timeout=2):
                return
        except OSError:
            time.sleep(0.1)
    raise RuntimeError(f"the service at {url} did not answer {path} within {timeout} s")


@contextlib.contextmanager
def running_service(*, workers: int = 2, env: dict | None = None, log=None):
    """Yield (base_url, process) for a gunicorn server; stop it (SIGTERM) afterwards."""
    port = free_port()
    metrics_dir = tempfile.mkdtemp(prefix="annuity-live-metrics-")
    full_env = os.environ | {"PORT": str(port), "HOST": "127.0.0.1",
                             "WEB_CONCURRENCY": str(workers),
                             "PROMETHEUS_MULTIPROC_DIR": metrics_dir} | (env or {})
    proc = subprocess.Popen(
        [str(GUNICORN), "--config", str(GUNICORN_CONF)],
        cwd=ROOT, env=full_env, stdout=log or subprocess.DEVNULL,
        stderr=log or subprocess.DEVNULL)
    url = f"http://127.0.0.1:{port}"
    try:
        wait_ready(url)
        yield url, proc
    finally:
        if proc.poll() is None:
            proc.send_signal(signal.SIGTERM)
            try:
                proc.wait(timeout=40)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait()


def gunicorn_settings(env: dict | None = None) -> dict:
    """The settings the gunicorn configuration gives under ``env`` (read, nothing started)."""
    import runpy

    saved = dict(os.environ)
    metrics_dir = tempfile.mkdtemp(prefix="annuity-settings-metrics-")
    try:
        os.environ.update(env or {})
        os.environ["PROMETHEUS_MULTIPROC_DIR"] = metrics_dir
        return runpy.run_path(str(GUNICORN_CONF))
    finally:
        os.environ.clear()
        os.environ.update(saved)
        os.rmdir(metrics_dir)
