"""A short contract run against the real gunicorn service (`make fuzz` runs the long one)."""

from tests.live.fuzz import run_fuzz


def test_live_service_passes_every_check():
    result = run_fuzz(max_examples=20, seed=2026, capture=True)
    assert result.returncode == 0, result.stdout[-6000:] + result.stderr[-2000:]
