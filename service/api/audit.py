"""The audit block and request id that every response carries."""

import re
import uuid
from datetime import UTC, datetime
from importlib import metadata

from flask import current_app, g, request

_REQUEST_ID = re.compile(r"^[A-Za-z0-9._:\-]{1,128}$")


def installed_version() -> str:
    """Return the installed package's version (read once, at start-up)."""
    try:
        return metadata.version("annuity-factor-service")
    except metadata.PackageNotFoundError:
        return "unknown"


def request_id() -> str:
    """Return this request's id: the caller's X-Request-ID if well-formed, else a new one."""
    if "request_id" not in g:
        incoming = request.headers.get("X-Request-ID", "")
        g.request_id = incoming if _REQUEST_ID.match(incoming) else uuid.uuid4().hex
    return g.request_id


def interest_block(curve, source: str) -> dict:
    """The interest structure as the audit block names it: kind, terms or edges, rates,
    digest and where it came from."""
    return curve.describe() | {"digest": curve.digest(), "source": source}


def use_basis(basis, curve=None) -> None:
    """Record which basis and interest this request used, for its audit block.

    ``curve`` is the request's own interest structure; None means the basis' interest.
    """
    g.audit_basis = {"id": basis.id, "version": basis.version, "digest": basis.digest,
                     "status": basis.status}
    if basis.improvement is not None:
        g.audit_basis["improvement"] = improvement_block(basis.improvement)
    g.audit_interest = interest_block(basis.interest if curve is None else curve,
                                      "basis" if curve is None else "request")


def improvement_block(improvement) -> dict:
    """The improvement scale and projection a basis uses, as answers name them."""
    scale = improvement.scale
    return {"scale": improvement.file, "kind": improvement.kind,
            "projection": improvement.projection, "base_year": scale.base_year,
            "year": improvement.year, "long_term_rate": scale.long_term_rate,
            "long_term_from": scale.long_term_from, "source": improvement.source}


def use_age_definition(basis) -> None:
    """Record that the request derived ages from dates of birth by the basis' definition."""
    if g.get("audit_basis") is not None:
        g.audit_basis["age_definition"] = basis.age_definition


def use_valuation_date(date) -> None:
    """Record the request's valuation date (None: it gave none) for its audit block."""
    g.audit_valuation_date = date


def audit_block() -> dict:
    dated = g.get("audit_valuation_date")
    return {
        "basis": g.get("audit_basis"),
        "interest": g.get("audit_interest"),
        **({"valuation_date": dated.isoformat()} if dated is not None else {}),
        "service": {"name": current_app.config["SERVICE_NAME"],
                    "version": current_app.config["SERVICE_VERSION"]},
        "request_id": request_id(),
        "computed_at": datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ"),
    }
