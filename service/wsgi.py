"""The WSGI entry that gunicorn serves: ``gunicorn 'service.wsgi:create_app()'``."""

import sys

from service.app import create_app as _create_app


def create_app(config: dict | None = None):
    """Build the app; stop with a clear message when the tables folder cannot be read."""
    try:
        return _create_app(config)
    except OSError as exc:
        print(f"annuity-factor-service: cannot start: {exc}", file=sys.stderr, flush=True)
        raise SystemExit(2) from None
