"""What one request has used so far, in one object: for its audit block, its log line and
its metrics.

Views record the basis, interest, valuation date and item count here as they learn them;
the audit block, the access log line and the metrics read them back. The object lives for
one request (on ``flask.g`` under a single name) and is never shared between requests.
"""

import time
from dataclasses import dataclass, field

from flask import g


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


def current() -> RequestState:
    """This request's state (made on first use)."""
    state = g.get("request_state")
    if state is None:
        state = g.request_state = RequestState()
    return state


def start() -> RequestState:
    """A new state for this request (its clock started now), replacing any."""
    state = g.request_state = RequestState()
    return state
