"""Against the real gunicorn service: chunked bodies over the limit, and invented methods.

gunicorn passes a chunked body to the app with no Content-Length, so these are the cases the
in-process tests (tests/api/test_hostile_traffic.py) can only imitate.
"""

import http.client
import json
import random
import string
import tempfile
import urllib.request

import pytest

from tests.live.server import running_service

LIMIT = 4 * 1024 * 1024  # the default MAX_CONTENT_LENGTH
VALID = json.dumps({"basis": "standard-ultimate",
                    "items": [{"lives": [{"age": 65}], "timing": "advance"}]}).encode()


@pytest.fixture(scope="module")
def live():
    with tempfile.TemporaryDirectory() as metrics_dir, \
            running_service(workers=2, env={"PROMETHEUS_MULTIPROC_DIR": metrics_dir}) as (url,
                                                                                        _):
        host, port = url.removeprefix("http://").split(":")
        yield url, host, int(port)


def _pieces(data: bytes, size: int = 64 * 1024):
    for start in range(0, len(data), size):
        yield data[start:start + size]


def _post_chunked(host: str, port: int, data: bytes) -> tuple[int, dict]:
    conn = http.client.HTTPConnection(host, port, timeout=60)
    try:
        # An iterable body with encode_chunked: Transfer-Encoding: chunked, no Content-Length.
        conn.request("POST", "/v1/annuity-factors", body=_pieces(data), encode_chunked=True,
                     headers={"Content-Type": "application/json"})
        response = conn.getresponse()
        return response.status, json.loads(response.read())
    finally:
        conn.close()


def test_chunked_valid_json_padded_past_the_limit_is_413(live):
    _, host, port = live
    # Over the limit by 64 KiB, little enough to sit in the socket buffers, so the client
    # finishes sending and reads the answer (the server does not read past the limit).
    status, body = _post_chunked(host, port, VALID + b" " * (LIMIT - len(VALID) + 65536))
    assert status == 413, body
    assert body["status"] == 413 and str(LIMIT) in body["detail"]


def test_chunked_body_at_the_limit_is_served(live):
    _, host, port = live
    status, body = _post_chunked(host, port, VALID + b" " * (LIMIT - len(VALID)))
    assert status == 200, body
    assert len(body["results"]) == 1


def _series(url: str) -> set[str]:
    with urllib.request.urlopen(f"{url}/metrics", timeout=10) as response:
        text = response.read().decode()
    return {line.rsplit(" ", 1)[0] for line in text.splitlines()
            if line.startswith("annuity_http_requests_total{")}


def test_invented_methods_and_paths_add_a_bounded_number_of_series(live):
    url, host, port = live
    rng = random.Random(8)
    before = _series(url)
    for n in range(300):
        method = "".join(rng.choices(string.ascii_uppercase, k=20))
        path = "/" + "".join(rng.choices(string.ascii_lowercase, k=20))
        conn = http.client.HTTPConnection(host, port, timeout=10)
        conn.request(method, path if n % 2 else "/v1/bases")
        assert conn.getresponse().status in (404, 405)
        conn.close()
    added = _series(url) - before
    # At most: (other, unmatched, 404) and (other, unmatched, 405), and the first read of
    # /metrics itself (counted after it answered).
    assert added <= {
        'annuity_http_requests_total{method="other",route="unmatched",status="404"}',
        'annuity_http_requests_total{method="other",route="unmatched",status="405"}',
        'annuity_http_requests_total{method="GET",route="/metrics",status="200"}'}, added
