"""Gunicorn trusts no forwarded headers: behind the proxy in the same pod every peer is
127.0.0.1, which gunicorn's own default would trust."""

import http.client
import json

from tests.live.server import running_service


def _get(url: str, path: str, headers: dict) -> tuple[int, bytes]:
    host, port = url.removeprefix("http://").split(":")
    conn = http.client.HTTPConnection(host, int(port), timeout=10)
    try:
        conn.request("GET", path, headers=headers)
        response = conn.getresponse()
        return response.status, response.read()
    finally:
        conn.close()


def test_script_name_from_loopback_is_ignored(monkeypatch):
    monkeypatch.delenv("FORWARDED_ALLOW_IPS", raising=False)  # the shipped default
    with running_service(workers=1) as (url, _):
        plain = _get(url, "/v1/bases", {})
        # A trusted SCRIPT_NAME of /v1 would move the route to /bases (a 404); gunicorn's
        # forwarder_headers documentation: only peers in forwarded_allow_ips may set it.
        forged = _get(url, "/v1/bases", {"SCRIPT_NAME": "/v1"})
    assert plain[0] == forged[0] == 200
    assert json.loads(plain[1])["bases"] == json.loads(forged[1])["bases"]
