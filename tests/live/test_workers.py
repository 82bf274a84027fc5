"""Every gunicorn worker gives bit-identical numbers for the same request."""

import json
import tempfile
import urllib.request
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

from tests.live.server import running_service

BODY = {"basis": "fernhollow-annuitants", "items": [
    {"lives": [{"age": 65.25, "sex": "female"}], "timing": "advance", "frequency": 12,
     "guarantee": 5, "escalation": 0.025},
    {"lives": [{"age": 70.5, "sex": "male"}, {"age": 67, "sex": "female"}],
     "timing": "continuous", "survivorship": "reversionary"},
    {"lives": [{"age": 58, "sex": "male", "duration": 0, "mortality_multiplier": 1.4}],
     "timing": "arrears", "frequency": 4, "deferral": 7, "term": 20},
]}


def _post(url: str, request_id: str) -> tuple[str, list[str]]:
    request = urllib.request.Request(
        f"{url}/v1/annuity-factors", data=json.dumps(BODY).encode(), method="POST",
        headers={"Content-Type": "application/json", "X-Request-ID": request_id})
    with urllib.request.urlopen(request, timeout=30) as response:
        results = json.loads(response.read())["results"]
    # repr keeps every bit of the double.
    return request_id, [repr(r["value"]) for r in results]


def test_same_request_same_bits_on_every_worker():
    with tempfile.NamedTemporaryFile(suffix=".log") as log_file:
        with open(log_file.name, "wb") as log, running_service(workers=4, log=log) as (url, _):
            with ThreadPoolExecutor(max_workers=8) as pool:
                answers = list(pool.map(lambda n: _post(url, f"same-{n}"), range(80)))
            with urllib.request.urlopen(f"{url}/metrics", timeout=10) as response:
                metrics = response.read().decode()
        pids = set()
        for line in Path(log_file.name).read_text().splitlines():
            if line.startswith("{") and '"same-' in line:
                pids.add(json.loads(line)["pid"])
    values = {tuple(v) for _, v in answers}
    assert len(values) == 1, values
    assert len(pids) >= 2, "the requests should have been spread over several workers"
    # The counts add up across the workers (Prometheus multiprocess mode).
    samples = dict(line.rsplit(" ", 1) for line in metrics.splitlines()
                   if line and not line.startswith("#"))
    key = 'annuity_http_requests_total{method="POST",route="/v1/annuity-factors",status="200"}'
    assert float(samples[key]) == 80
    factors = 'annuity_factors_computed_total{basis="fernhollow-annuitants@2026.1",kind="factor"}'
    assert float(samples[factors]) == 80 * len(BODY["items"])
    assert sum(1 for k in samples if k.startswith("annuity_basis_info{")) == 5
