"""The web layer: routes, schemas, problem details, audit block, request ids, metrics."""

from flask import Blueprint, Flask

from service.api import observe, problems


def route_blueprints() -> tuple[Blueprint, ...]:
    """Every blueprint with routes: the API, the contract and /docs, the metrics."""
    from service.api.metrics import bp as metrics_bp
    from service.api.openapi import bp as contract_bp
    from service.api.views import bp

    return bp, contract_bp, metrics_bp


def init_app(app: Flask) -> None:
    """Register the routes, the error handling and the per-request bookkeeping on ``app``."""
    from service.api.openapi import bp as contract_bp
    from service.api.views import bp

    app.register_blueprint(bp)
    app.register_blueprint(contract_bp)
    problems.init_app(app)
    observe.init_app(app)
