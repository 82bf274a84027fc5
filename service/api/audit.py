"""The audit block and request id that every response carries."""

import os
import re
import weakref
from datetime import UTC, datetime
from importlib import metadata
from types import MappingProxyType

from service.api.state import current

_REQUEST_ID = re.compile(r"^[A-Za-z0-9._:\-]{1,128}$")


def installed_version() -> str:
    """Return the installed package's version (read once, at start-up)."""
    try:
        return metadata.version("annuity-factor-service")
    except metadata.PackageNotFoundError:
        return "unknown"


def request_id(state=None) -> str:
    """Return this request's id: the caller's X-Request-ID if well-formed, else a new one.
    ``state``: this request's state, where the caller holds it already."""
    if state is None:
        state = current()
    if state.request_id is None:
        # (request.headers.get("X-Request-ID", ""), read where the headers live)
        incoming = state.http.environ.get("HTTP_X_REQUEST_ID", "")
        state.request_id = incoming if _REQUEST_ID.match(incoming) else os.urandom(16).hex()
    return state.request_id


def interest_block(curve, source: str) -> dict:
    """The interest structure as the audit block names it: kind, terms or edges, rates,
    digest and where it came from."""
    return curve.describe() | {"digest": curve.digest(), "source": source}


#: Each loaded basis' own audit blocks (what it is; its interest), made once and read-only
#: (requests share them): a basis is immutable after loading. Keyed by the basis object
#: itself, so two bases (or two versions of one) never share an entry, and an entry goes
#: with its basis.
_BASIS_BLOCKS: "weakref.WeakKeyDictionary[object, tuple[dict, dict]]" = \
    weakref.WeakKeyDictionary()
#: Interest blocks of request structures, by what the block is made of (kind and the reprs
#: of the terms or edges and rates, which are what its JSON and digest are written from).
_CURVE_BLOCKS: dict[tuple, dict] = {}
_CURVE_BLOCKS_KEPT = 512


def _basis_blocks(basis) -> tuple[dict, dict]:
    found = _BASIS_BLOCKS.get(basis)
    if found is None:
        block = {"id": basis.id, "version": basis.version, "digest": basis.digest,
                 "status": basis.status}
        if basis.improvement is not None:
            block["improvement"] = improvement_block(basis.improvement)
        found = _BASIS_BLOCKS[basis] = (MappingProxyType(block), MappingProxyType(
            interest_block(basis.interest, "basis")))
    return found


def _request_interest_block(curve) -> dict:
    key = (curve.kind, tuple(map(repr, curve.knots)), tuple(map(repr, curve.rates)))
    found = _CURVE_BLOCKS.get(key)
    if found is None:
        found = MappingProxyType(interest_block(curve, "request"))
        if len(_CURVE_BLOCKS) >= _CURVE_BLOCKS_KEPT:
            _CURVE_BLOCKS.clear()
        _CURVE_BLOCKS[key] = found
    return found


def use_basis(basis, curve=None, state=None) -> None:
    """Record which basis and interest this request used, for its audit block.

    ``curve`` is the request's own interest structure; None means the basis' interest.
    ``state``: this request's state, where the caller holds it already. The blocks are the
    ones made once per basis (or per request structure), shared and never changed: a request
    that adds to its own replaces it by a copy (as :func:`use_age_definition` does).
    """
    if state is None:
        state = current()
    block, interest = _basis_blocks(basis)
    state.basis = block
    state.interest = interest if curve is None else _request_interest_block(curve)


def improvement_block(improvement) -> dict:
    """The improvement scale and projection a basis uses, as answers name them."""
    scale = improvement.scale
    return {"scale": improvement.file, "kind": improvement.kind,
            "projection": improvement.projection, "base_year": scale.base_year,
            "year": improvement.year, "long_term_rate": scale.long_term_rate,
            "long_term_from": scale.long_term_from, "source": improvement.source}


def use_age_definition(basis) -> None:
    """Record that the request derived ages from dates of birth by the basis' definition."""
    state = current()
    if state.basis is not None and "age_definition" not in state.basis:
        state.basis = state.basis | {"age_definition": basis.age_definition}  # (shared)


def use_valuation_date(date, state=None) -> None:
    """Record the request's valuation date (None: it gave none) for its audit block."""
    (current() if state is None else state).valuation_date = date


def audit_block(state=None) -> dict:
    """This request's audit block (``state``: its state, where the caller holds it)."""
    if state is None:
        state = current()
    dated = state.valuation_date
    config = state.app.config
    return {
        "basis": state.basis,
        "interest": state.interest,
        **({"valuation_date": dated.isoformat()} if dated is not None else {}),
        "service": _service_block(config["SERVICE_NAME"], config["SERVICE_VERSION"]),
        "request_id": request_id(state),
        "computed_at": computed_at(datetime.now(UTC)),
    }


def _service_block(name: str, version: str) -> MappingProxyType:
    """The service's audit block, made once per name and version and shared read-only."""
    found = _SERVICE_BLOCKS.get((name, version))
    if found is None:
        if len(_SERVICE_BLOCKS) >= 64:
            _SERVICE_BLOCKS.clear()
        found = _SERVICE_BLOCKS[name, version] = MappingProxyType(
            {"name": name, "version": version})
    return found


_SERVICE_BLOCKS: dict[tuple, MappingProxyType] = {}


def computed_at(moment: datetime) -> str:
    """``moment`` (UTC) as ``%Y-%m-%dT%H:%M:%S.%fZ``: microseconds always, then Z (written by
    isoformat, about twice as fast as strftime)."""
    return moment.replace(tzinfo=None).isoformat(timespec="microseconds") + "Z"
