"""The WSGI entry that gunicorn serves: ``gunicorn 'service.wsgi:create_app()'``."""

from service.app import create_app

__all__ = ["create_app"]
