"""Every gunicorn worker gives bit-identical numbers, and metrics add up across workers."""

import json
import tempfile
import urllib.request
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import pytest
from hypothesis import given, settings

from tests.live.server import running_service
from tests.strategies import factor_requests

FIXED = {"basis": "fernhollow-annuitants", "items": [
    {"lives": [{"age": 65.25, "sex": "female"}], "timing": "advance", "frequency": 12,
     "guarantee": 5, "escalation": 0.025},
    {"lives": [{"age": 70.5, "sex": "male"}, {"age": 67, "sex": "female"}],
     "timing": "continuous", "survivorship": "reversionary"},
    {"lives": [{"age": 58, "sex": "male", "duration": 0, "mortality_multiplier": 1.4}],
     "timing": "arrears", "frequency": 4, "deferral": 7, "term": 20},
]}


@pytest.fixture(scope="module")
def live():
    with tempfile.TemporaryDirectory() as folder:
        log_path = Path(folder) / "service.log"
        with open(log_path, "wb") as log, running_service(workers=4, log=log) as (url, _):
            yield url, log_path


def _post(url: str, body: dict, request_id: str) -> tuple[int, str]:
    request = urllib.request.Request(
        f"{url}/v1/annuity-factors", data=json.dumps(body).encode(), method="POST",
        headers={"Content-Type": "application/json", "X-Request-ID": request_id})
    try:
        with urllib.request.urlopen(request, timeout=30) as response:
            results = json.loads(response.read())["results"]
            # repr keeps every bit of the double.
            return response.status, "|".join(repr(r["value"]) for r in results)
    except urllib.error.HTTPError as exc:
        return exc.code, ""


def _served_by(log_path: Path, prefix: str) -> set[int]:
    pids = set()
    for line in log_path.read_text().splitlines():
        if line.startswith("{") and f'"request_id":"{prefix}' in line:
            pids.add(json.loads(line)["pid"])
    return pids


def _same_everywhere(url: str, body: dict, prefix: str, copies: int) -> set:
    with ThreadPoolExecutor(max_workers=8) as pool:
        answers = list(pool.map(lambda n: _post(url, body, f"{prefix}-{n}"), range(copies)))
    return set(answers)


def test_fixed_request_same_bits_on_every_worker_and_metrics_add_up(live):
    url, log_path = live
    answers = _same_everywhere(url, FIXED, "fixed", 80)
    assert len(answers) == 1 and next(iter(answers))[0] == 200, answers
    assert len(_served_by(log_path, "fixed")) >= 2, "requests should reach several workers"
    with urllib.request.urlopen(f"{url}/metrics", timeout=10) as response:
        metrics = response.read().decode()
    samples = dict(line.rsplit(" ", 1) for line in metrics.splitlines()
                   if line and not line.startswith("#"))
    factors = 'annuity_factors_computed_total{basis="fernhollow-annuitants@2026.1",kind="factor"}'
    assert float(samples[factors]) == 80 * len(FIXED["items"])
    # One info series per shipped basis file (each a version of its own).
    shipped = len(list((Path(__file__).parents[2] / "tables").glob("*.toml")))
    assert sum(1 for k in samples if k.startswith("annuity_basis_info{")) == shipped
    # Every request of this module so far was a 200 POST to this route.
    key = 'annuity_http_requests_total{method="POST",route="/v1/annuity-factors",status="200"}'
    assert float(samples[key]) >= 80


_counter = iter(range(10**9))


@settings(max_examples=20, deadline=None)
@given(body=factor_requests())
def test_random_requests_same_bits_on_every_worker(live, body):
    url, _ = live
    answers = _same_everywhere(url, body, f"random{next(_counter)}", 8)
    assert len(answers) == 1, answers
