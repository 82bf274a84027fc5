"""The production arrangement on loopback: nginx (deploy/nginx/) in front of gunicorn.

nginx runs as a child process (never a daemon) with a configuration rendered from the one
template in deploy/nginx/ into a temporary directory that also holds its pid file, logs and
temporary files; it listens on 127.0.0.1 only. `ensure_nginx()` installs Debian's nginx
when it is missing and this is a Debian machine run as root (as in CI), quietly and only once.
"""

import contextlib
import importlib.util
import os
import shutil
import signal
import subprocess
import tempfile
import time
import urllib.request
from dataclasses import dataclass
from pathlib import Path

from tests.live.server import ROOT, free_port, running_service

RENDER = ROOT / "deploy" / "nginx" / "render.py"
_POLICY = Path("/usr/sbin/policy-rc.d")


def render_module():
    """deploy/nginx/render.py, loaded by path (deploy/ is not a package)."""
    spec = importlib.util.spec_from_file_location("annuity_nginx_render", RENDER)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def nginx_binary() -> str | None:
    found = shutil.which("nginx")
    if found:
        return found
    return "/usr/sbin/nginx" if os.access("/usr/sbin/nginx", os.X_OK) else None


def ensure_nginx() -> str:
    """The nginx binary; installed from Debian's packages (apt-get) when missing."""
    found = nginx_binary()
    if found:
        return found
    if os.geteuid() != 0 or not shutil.which("apt-get"):
        raise RuntimeError("nginx is not installed: install Debian's nginx package "
                           "(apt-get install nginx) or run as root on Debian to have it "
                           "installed")
    print("installing nginx from Debian's packages (apt-get) ...", flush=True)
    env = os.environ | {"DEBIAN_FRONTEND": "noninteractive"}
    # The package would start a system-wide nginx on port 80; a policy file that denies
    # service starts (as container images have) prevents that while installing.
    made_policy = not _POLICY.exists()
    if made_policy:
        _POLICY.write_text("#!/bin/sh\nexit 101\n")
        _POLICY.chmod(0o755)
    try:
        for argv in (["apt-get", "update", "-qq"],
                     ["apt-get", "install", "-y", "-qq", "--no-install-recommends", "nginx"]):
            done = subprocess.run(argv, env=env, capture_output=True, text=True, check=False)
            if done.returncode != 0:
                raise RuntimeError(f"{' '.join(argv)} failed:\n{done.stdout}{done.stderr}")
    finally:
        if made_policy:
            _POLICY.unlink(missing_ok=True)
    found = nginx_binary()
    if not found:
        raise RuntimeError("apt-get installed nginx but no nginx binary was found")
    return found


def wait_http(url: str, timeout: float = 20.0) -> None:
    deadline = time.monotonic() + timeout
    while True:
        try:
            with urllib.request.urlopen(url, timeout=2):
                return
        except OSError:
            if time.monotonic() > deadline:
                raise RuntimeError(f"{url} did not answer within {timeout} s") from None
            time.sleep(0.1)


@dataclass
class Proxy:
    url: str            # where clients go
    health_url: str     # the proxy's own liveness endpoint
    proc: subprocess.Popen
    directory: Path     # configuration, logs, pid and temporary files
    config: str


@contextlib.contextmanager
def running_proxy(upstream: str, *, nginx: str | None = None):
    """Yield a Proxy in front of ``upstream`` (host:port); stop it and clean up afterwards."""
    binary = nginx or ensure_nginx()
    render = render_module()
    directory = Path(tempfile.mkdtemp(prefix="annuity-proxy-"))
    # nginx's workers drop root privileges (to nobody) and write temporary files here.
    directory.chmod(0o755)
    port, health_port = free_port(), free_port()
    config = render.render(render.values_for({
        "listen": f"127.0.0.1:{port}", "health_listen": f"127.0.0.1:{health_port}",
        "upstream": upstream, "runtime_dir": str(directory),
        "error_log": str(directory / "error.log"), "access_log": str(directory / "access.log"),
    }))
    conf = directory / "nginx.conf"
    conf.write_text(config)
    proc = subprocess.Popen([binary, "-c", str(conf), "-e", str(directory / "error.log")],
                            stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    proxy = Proxy(f"http://127.0.0.1:{port}", f"http://127.0.0.1:{health_port}/livez", proc,
                  directory, config)
    try:
        wait_http(proxy.health_url)
        yield proxy
    finally:
        if proc.poll() is None:
            proc.send_signal(signal.SIGTERM)
            try:
                proc.wait(timeout=20)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait()
        shutil.rmtree(directory, ignore_errors=True)


@contextlib.contextmanager
def running_production(*, workers: int = 4, env: dict | None = None, log=None):
    """Yield (proxy, gunicorn_url, gunicorn_process): the pod's arrangement on loopback."""
    with running_service(workers=workers, env=env, log=log) as (url, proc), \
            running_proxy(url.removeprefix("http://")) as proxy:
        wait_http(proxy.url + "/readyz")
        yield proxy, url, proc
