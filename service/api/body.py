"""Strict JSON request bodies: one media type, UTF-8, no duplicates, no NaN or Infinity."""

import json
import math

from flask import request
from marshmallow import Schema, ValidationError

from service.api.problems import ProblemError


class _BodyError(ValueError):
    pass


def _no_duplicates(pairs):
    seen = {}
    for key, value in pairs:
        if key in seen:
            raise _BodyError(f"duplicate key '{key}'")
        seen[key] = value
    return seen


def _reject_constant(name):
    raise _BodyError(f"'{name}' is not a JSON number")


def _finite_float(text):
    value = float(text)
    if not math.isfinite(value):
        raise _BodyError(f"number {text} is out of range")
    return value


def json_body():
    """Return the parsed JSON body, or raise a 4xx problem saying what is wrong with it."""
    if request.mimetype != "application/json":
        raise ProblemError(415, "Send the body as application/json.")
    charset = request.mimetype_params.get("charset", "utf-8").lower()
    if charset not in ("utf-8", "utf8"):
        raise ProblemError(415, f"Send the body as UTF-8 JSON, not {charset}.")
    raw = request.get_data(cache=False)  # enforces MAX_CONTENT_LENGTH (413) before parsing
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ProblemError(400, f"The body is not valid UTF-8 (byte {exc.start}).") from None
    try:
        return json.loads(text, object_pairs_hook=_no_duplicates,
                          parse_constant=_reject_constant, parse_float=_finite_float)
    except _BodyError as exc:
        raise ProblemError(400, f"The body is not acceptable JSON: {exc}.") from None
    except json.JSONDecodeError as exc:
        raise ProblemError(400, f"The body is not valid JSON: {exc.msg} at line {exc.lineno} "
                                f"column {exc.colno}.") from None
    except (RecursionError, ValueError) as exc:
        raise ProblemError(400, f"The body is not acceptable JSON: {exc}.") from None


def flatten_errors(messages, prefix: str = "") -> dict[str, list[str]]:
    """Turn marshmallow's nested messages into ``{"items.0.lives.0.age": [...]}``."""
    flat: dict[str, list[str]] = {}
    if isinstance(messages, dict):
        for key, value in messages.items():
            name = prefix if key == "_schema" else (f"{prefix}.{key}" if prefix else str(key))
            for path, msgs in flatten_errors(value, name).items():
                flat.setdefault(path, []).extend(msgs)
    elif isinstance(messages, list) and all(isinstance(m, str) for m in messages):
        flat[prefix or "body"] = list(messages)
    else:
        flat[prefix or "body"] = [str(messages)]
    return flat


def load(schema: Schema, data):
    """Validate ``data`` with ``schema``; raise a 422 problem with field paths if it fails."""
    if not isinstance(data, dict):
        raise ProblemError(422, "The body must be a JSON object.", errors={"body": [
            "Must be an object."]})
    try:
        return schema.load(data)
    except ValidationError as exc:
        raise ProblemError(422, "The request has invalid fields.",
                           errors=flatten_errors(exc.messages)) from None
