"""Properties of the HTTP answers over random valid requests."""

import json
import math

from hypothesis import HealthCheck, given, settings

from tests.strategies import factor_requests

SETTINGS = settings(max_examples=80, deadline=None,
                    suppress_health_check=[HealthCheck.function_scoped_fixture])


def _numbers(value):
    if isinstance(value, dict):
        for v in value.values():
            yield from _numbers(v)
    elif isinstance(value, list):
        for v in value:
            yield from _numbers(v)
    elif isinstance(value, int | float) and not isinstance(value, bool):
        yield value


class TestFactorResponses:
    @SETTINGS
    @given(factor_requests())
    def test_no_nan_or_infinity_ever_reaches_a_response(self, client, body):
        response = client.post("/v1/annuity-factors", json=body)
        assert response.status_code in (200, 422), response.get_data(as_text=True)
        text = response.get_data(as_text=True)
        # Strict parsing: NaN or Infinity in the text would raise here.
        parsed = json.loads(text, parse_constant=lambda name: (_ for _ in ()).throw(
            AssertionError(f"{name} in response")))
        assert all(math.isfinite(x) for x in _numbers(parsed))
        if response.status_code == 200:
            assert all(r["value"] >= 0 for r in parsed["results"])

    @SETTINGS
    @given(factor_requests())
    def test_same_request_same_bits(self, client, body):
        first = client.post("/v1/annuity-factors", json=body).get_json()
        second = client.post("/v1/annuity-factors", json=body).get_json()
        if "results" in first:
            assert [repr(r["value"]) for r in first["results"]] == \
                [repr(r["value"]) for r in second["results"]]
