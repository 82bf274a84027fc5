"""Checks shared by the API tests: the one shape every error response has."""

PROBLEM_KEYS = {"type", "title", "status", "detail", "request_id", "audit"}


def assert_problem(response, status: int, error_path: str | None = None) -> dict:
    """Check ``response`` is an RFC 9457 problem with ``status``; return its body.

    With ``error_path``, the ``errors`` map must name that field path.
    """
    text = response.get_data(as_text=True)
    assert response.status_code == status, text
    assert response.mimetype == "application/problem+json", response.mimetype
    assert "Traceback" not in text
    body = response.get_json(force=True)
    assert PROBLEM_KEYS <= set(body), body
    assert body["status"] == status
    assert isinstance(body["type"], str) and body["type"]
    assert isinstance(body["title"], str) and body["title"]
    assert isinstance(body["detail"], str) and body["detail"]
    assert body["request_id"] == response.headers["X-Request-ID"]
    assert body["audit"]["request_id"] == body["request_id"]
    if error_path is not None:
        assert error_path in body.get("errors", {}), body.get("errors")
        assert all(isinstance(m, str) and m for m in body["errors"][error_path])
    return body
