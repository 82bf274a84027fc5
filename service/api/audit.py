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
    g.audit_interest = interest_block(basis.interest if curve is None else curve,
                                      "basis" if curve is None else "request")


def audit_block() -> dict:
    return {
        "basis": g.get("audit_basis"),
        "interest": g.get("audit_interest"),
        "service": {"name": current_app.config["SERVICE_NAME"],
                    "version": current_app.config["SERVICE_VERSION"]},
        "request_id": request_id(),
        "computed_at": datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ"),
    }
