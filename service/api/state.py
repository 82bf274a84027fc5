"""What one request has used so far, in one object: for its audit block, its log line and
its metrics.

Views record the basis, interest, valuation date and item count here as they learn them;
the audit block, the access log line and the metrics read them back. The object lives for
one request (on ``flask.g`` under a single name) and is never shared between requests.
"""

import time
from dataclasses import dataclass, field

from flask import current_app, g, request


@dataclass
class RequestState:
    """One request's bookkeeping."""

    started: float = field(default_factory=time.perf_counter)
    request_id: str | None = None
    #: The basis used, as the audit block names it (id, version, digest, status, ...).
    basis: dict | None = None
    #: The interest used, as the audit block names it.
    interest: dict | None = None
    valuation_date: object = None
    #: Items in the request (for the log line).
    item_count: int | None = None
    #: The request and the app it came to (what flask.request and flask.current_app stand
    #: for while it is answered): each look-up through those proxies costs about a
    #: microsecond, and a request makes a dozen.
    http: object = None
    app: object = None


def current() -> RequestState:
    """This request's state (made on first use)."""
    state = g.get("request_state")
    if state is None:
        state = start()
    return state


def start(http=None, app=None) -> RequestState:
    """A new state for this request (its clock started now), replacing any; ``http`` and
    ``app``: the request and its app, where the caller holds them."""
    state = g.request_state = RequestState(
        http=request._get_current_object() if http is None else http,
        app=current_app._get_current_object() if app is None else app)
    return state
