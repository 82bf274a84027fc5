"""The package as users get it: a wheel installed into a new virtual environment (not the
editable checkout) serves from any working directory, and `serve`'s flags win over the
environment.

Building the wheel uses pip's isolated build, as `make install` does. To stay quick and off
the network, the new environment gets its third-party dependencies (flask, numpy, gunicorn...)
by a path file pointing at this environment's site-packages; the project itself comes only
from the wheel.
"""

import argparse
import json
import os
import shutil
import signal
import subprocess
import sys
import sysconfig
import time
import urllib.request
import zipfile
from pathlib import Path

import pytest

from service import cli
from tests.live.server import free_port

ROOT = Path(__file__).resolve().parents[2]


def _run(argv, **kwargs):
    done = subprocess.run(argv, capture_output=True, text=True, check=False, **kwargs)
    assert done.returncode == 0, f"{argv}:\n{done.stdout}\n{done.stderr}"
    return done


@pytest.fixture(scope="module")
def installed(tmp_path_factory):
    """(venv, clean environment variables) with the built wheel installed."""
    base = tmp_path_factory.mktemp("installed")
    # Build from a copy of what the package is made of, not in the checkout.
    source = base / "source"
    source.mkdir()
    for name in ("pyproject.toml", "README.md"):
        shutil.copy(ROOT / name, source / name)
    shutil.copytree(ROOT / "tables", source / "tables")
    shutil.copytree(ROOT / "service", source / "service", symlinks=True,
                    ignore=shutil.ignore_patterns("__pycache__"))
    wheels = base / "wheels"
    _run([sys.executable, "-m", "pip", "wheel", "--quiet", "--no-deps",
          "--wheel-dir", str(wheels), str(source)])
    (wheel,) = wheels.glob("*.whl")
    venv = base / "venv"
    _run([sys.executable, "-m", "venv", "--without-pip", str(venv)])
    python = venv / "bin" / "python"
    _run([sys.executable, "-m", "pip", "--python", str(python), "install", "--quiet",
          "--no-deps", "--no-index", str(wheel)])
    site = Path(_run([str(python), "-c", "import sysconfig; "
                      "print(sysconfig.get_paths()['purelib'])"]).stdout.strip())
    (site / "_annuity_test_dependencies.pth").write_text(
        sysconfig.get_paths()["purelib"] + "\n")
    env = {k: v for k, v in os.environ.items()
           if not k.startswith(("ANNUITY_", "PYTHON", "PROMETHEUS_", "WEB_"))
           and k not in {"PORT", "HOST"}}
    return venv, wheel, env


def test_wheel_holds_the_gunicorn_config_and_the_default_tables(installed):
    _, wheel, _ = installed
    names = set(zipfile.ZipFile(wheel).namelist())
    assert "service/serving/gunicorn.conf.py" in names
    shipped = {p.relative_to(ROOT).as_posix() for p in (ROOT / "tables").rglob("*")
               if p.is_file()}
    assert {f"service/serving/{name}" for name in shipped} <= names


def test_installed_command_finds_its_default_tables_from_anywhere(installed, tmp_path):
    venv, _, env = installed
    done = _run([str(venv / "bin" / "annuity-service"), "check-tables"], cwd=tmp_path, env=env)
    ok = [line for line in done.stdout.splitlines() if line.startswith("ok ")]
    assert len(ok) == len(list((ROOT / "tables").glob("*.toml")))
    where = _run([str(venv / "bin" / "python"), "-c",
                  "import service.serving as s; print(s.SHIPPED_TABLES, s.GUNICORN_CONF)"],
                 cwd=tmp_path, env=env).stdout.split()
    assert all(Path(p).is_relative_to(venv) and Path(p).exists() for p in where)


def test_installed_command_serves_from_another_directory(installed, tmp_path):
    venv, _, env = installed
    tables = tmp_path / "my-tables"
    tables.mkdir()
    shutil.copy(ROOT / "tables" / "standard-ultimate-2026.1.toml", tables)
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    ignored, port = free_port(), free_port()
    log = tmp_path / "serve.log"
    with log.open("wb") as out:
        proc = subprocess.Popen(
            [str(venv / "bin" / "annuity-service"), "serve", "--port", str(port),
             "--workers", "1"],
            cwd=elsewhere, stdout=out, stderr=out,
            env=env | {"ANNUITY_TABLES_DIR": str(tables), "PORT": str(ignored),
                       "PROMETHEUS_MULTIPROC_DIR": str(tmp_path / "metrics")})
    url = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + 60
        while True:
            try:
                with urllib.request.urlopen(f"{url}/v1/bases", timeout=2) as response:
                    bases = json.loads(response.read())["bases"]
                break
            except OSError:
                assert proc.poll() is None, log.read_text()
                assert time.monotonic() < deadline, "the installed service did not start"
                time.sleep(0.2)
        # Only the bases of ANNUITY_TABLES_DIR, on the port of the flag, not of PORT.
        assert [f"{b['id']}@{b['version']}" for b in bases] == ["standard-ultimate@2026.1"]
        with pytest.raises(OSError):
            urllib.request.urlopen(f"http://127.0.0.1:{ignored}/livez", timeout=2)
        request = urllib.request.Request(
            f"{url}/v1/annuity-factors", method="POST",
            headers={"Content-Type": "application/json"},
            data=json.dumps({"basis": "standard-ultimate", "items": [
                {"lives": [{"age": 60}], "timing": "advance"}]}).encode())
        with urllib.request.urlopen(request, timeout=10) as response:
            value = json.loads(response.read())["results"][0]["value"]
        # Dickson, Hardy and Waters, AMLCR (2nd ed.), Standard Ultimate Survival Model at 5%:
        # whole-life annuity-due at 60 is 14.9041 (../shared/checks/published-values.md).
        assert value == pytest.approx(14.9041, abs=5e-4)
    finally:
        proc.send_signal(signal.SIGTERM)
        proc.wait(timeout=40)


def test_serve_flags_win_over_the_environment(monkeypatch):
    monkeypatch.setenv("PORT", "9100")
    monkeypatch.setenv("HOST", "127.0.0.1")
    args = argparse.Namespace(port=9200, host=None, workers=3)
    argv = cli.serve_command(args)
    assert os.environ["PORT"] == "9200"
    assert os.environ["HOST"] == "127.0.0.1"
    assert os.environ["WEB_CONCURRENCY"] == "3"
    assert argv[:3] == [sys.executable, "-m", "gunicorn"]
    assert Path(argv[argv.index("--config") + 1]).is_file()
    # Without the flag, the environment still decides.
    monkeypatch.setenv("PORT", "9300")
    cli.serve_command(argparse.Namespace(port=None, host=None, workers=None))
    assert os.environ["PORT"] == "9300"
