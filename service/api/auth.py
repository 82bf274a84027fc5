"""Optional bearer tokens for the /v1 routes.

``AUTH_TOKEN_SHA256`` holds the SHA-256 hex digests of the accepted tokens (never the tokens
themselves); empty means /v1 is open, for local use. Health, metrics, the contract and
/docs are always open.
"""

import hashlib
import hmac

from flask import Flask, request

from service.api.problems import ProblemError

#: The challenge a 401 answer carries.
CHALLENGE = 'Bearer realm="annuity-factor-service"'


def check_token(app: Flask) -> None:
    """Refuse (401) a /v1 request without an accepted bearer token, when tokens are set."""
    hashes = app.config["AUTH_TOKEN_SHA256"]
    if not hashes or not request.path.startswith("/v1/"):
        return
    header = request.headers.get("Authorization", "")
    scheme, _, token = header.partition(" ")
    digest = hashlib.sha256(token.strip().encode("utf-8")).hexdigest()
    # Compare against every stored hash, in constant time, without stopping early.
    matched = False
    for stored in hashes:
        matched |= hmac.compare_digest(digest, stored)
    if scheme.lower() != "bearer" or not token.strip() or not matched:
        raise ProblemError(401, "A valid bearer token is required for /v1 routes.",
                           title="Unauthorised")
