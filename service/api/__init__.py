"""The web layer: routes, schemas, problem details, audit block and request ids."""

from flask import Flask

from service.api import problems
from service.api.audit import request_id


def init_app(app: Flask) -> None:
    """Register the routes and the error handling on ``app``."""
    from service.api.openapi import bp as contract_bp
    from service.api.views import bp

    app.register_blueprint(bp)
    app.register_blueprint(contract_bp)
    problems.init_app(app)

    @app.after_request
    def _request_id_header(response):
        response.headers["X-Request-ID"] = request_id()
        return response
