"""Request logs, metrics and bearer-token authentication."""

import hashlib
import json
import logging

import pytest

from service import create_app
from tests.api.problem import assert_problem

BODY = {"basis": "fernhollow-annuitants@2026.1",
        "items": [{"lives": [{"age": 66, "sex": "male"}], "timing": "advance"}] * 3}


class TestRequestLog:
    def test_one_json_line_per_request_and_nothing_else_at_info(self, client, caplog):
        caplog.set_level(logging.INFO)
        response = client.post("/v1/annuity-factors", json=BODY,
                               headers={"X-Request-ID": "log-check-1"})
        assert response.status_code == 200
        records = [r for r in caplog.records if r.levelno >= logging.INFO]
        assert len(records) == 1
        line = json.loads(records[0].getMessage())
        assert line["request_id"] == "log-check-1"
        assert line["route"] == "/v1/annuity-factors"
        assert line["status"] == 200
        assert line["duration_ms"] >= 0
        assert line["basis"] == "fernhollow-annuitants@2026.1"
        assert line["basis_version"] == "2026.1"
        assert line["items"] == 3

    def test_errors_are_logged_once_too(self, client, caplog):
        caplog.set_level(logging.INFO)
        client.post("/v1/annuity-factors", json={"basis": "nope", "items": BODY["items"]})
        records = [r for r in caplog.records if r.levelno >= logging.INFO]
        assert len(records) == 1
        assert json.loads(records[0].getMessage())["status"] == 404


class TestMetrics:
    def test_requests_factors_and_bases_are_exported(self, client):
        client.post("/v1/annuity-factors", json=BODY)
        text = client.get("/metrics").get_data(as_text=True)
        assert ('annuity_http_requests_total{method="POST",route="/v1/annuity-factors",'
                'status="200"}') in text
        assert "annuity_http_request_duration_seconds_bucket{" in text
        assert 'annuity_factors_computed_total{basis="fernhollow-annuitants@2026.1",' in text
        registry = client.application.extensions["registry"]
        info = [line for line in text.splitlines() if line.startswith("annuity_basis_info{")]
        assert len(info) == len(registry.bases)
        for basis in registry.bases.values():
            assert any(f'digest="{basis.digest}"' in line for line in info)


TOKEN = "fernhollow-quote-engine-token"


@pytest.fixture()
def guarded():
    digest = hashlib.sha256(TOKEN.encode()).hexdigest()
    return create_app({"TESTING": True, "AUTH_TOKEN_SHA256": (digest,)}).test_client()


class TestBearerTokens:
    @pytest.mark.parametrize("header", (None, "Bearer wrong", "Basic abc", "Bearer ",
                                        f"Token {TOKEN}"))
    def test_v1_routes_need_a_valid_token(self, guarded, header):
        headers = {"Authorization": header} if header else {}
        response = guarded.post("/v1/annuity-factors", json=BODY, headers=headers)
        assert_problem(response, 401)
        assert response.headers["WWW-Authenticate"].startswith("Bearer")

    def test_valid_token_is_served(self, guarded):
        response = guarded.post("/v1/annuity-factors", json=BODY,
                                headers={"Authorization": f"Bearer {TOKEN}"})
        assert response.status_code == 200

    @pytest.mark.parametrize("path", ("/livez", "/readyz", "/metrics", "/openapi.json"))
    def test_health_metrics_and_contract_stay_open(self, guarded, path):
        assert guarded.get(path).status_code == 200

    def test_off_by_default(self, client):
        assert client.get("/v1/bases").status_code == 200

    def test_tokens_are_configured_as_hashes_from_the_environment(self, monkeypatch):
        digest = hashlib.sha256(TOKEN.encode()).hexdigest()
        monkeypatch.setenv("ANNUITY_TOKEN_SHA256", f" {digest.upper()} , ")
        app = create_app({"TESTING": True})
        assert app.config["AUTH_TOKEN_SHA256"] == (digest,)
        ok = app.test_client().get("/v1/bases", headers={"Authorization": f"Bearer {TOKEN}"})
        assert ok.status_code == 200
