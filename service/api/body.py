"""Strict JSON request bodies: one media type, UTF-8, no duplicates, no NaN or Infinity.

Invalid input is reported cheaply: at most ``MAX_ERROR_PATHS`` error paths are listed, and
validation stops taking list elements (items, lives) once that many have been found, so a
large batch of bad items costs about as much as its first few. The paths listed are the
first ones, in order, that validating the whole body would give, with the same messages.
"""

import contextvars
import copy
import json
import math
import threading
import weakref

from flask import request
from marshmallow import RAISE, Schema, ValidationError, fields, utils
from marshmallow.decorators import PRE_LOAD, VALIDATES_SCHEMA
from werkzeug.exceptions import ClientDisconnected, RequestEntityTooLarge
from werkzeug.http import parse_options_header
from werkzeug.wsgi import get_content_length

from service.api.problems import MAX_ERROR_PATHS, ProblemError

#: Members one JSON object below the top level may have. No object in a request has more
#: than a dozen fields; the limit keeps unknown-field checking cheap (the top level has no
#: limit: its unknown fields are counted, not each checked).
MAX_OBJECT_MEMBERS = 1000


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


def _read_body(http=None) -> bytes:
    """Return the raw body; 413 when it is over the limit, however it is framed (``http``:
    the request, where the caller holds it)."""
    if http is None:
        http = request._get_current_object()
    environ = http.environ
    length = content_length(environ)
    limit = http.max_content_length
    if length is not None:
        # As request.get_data() reads it, without its stream wrapper: 413 over the limit
        # before reading anything; a body shorter than its Content-Length is a client that
        # went away (400).
        if limit is not None and length > limit:
            raise RequestEntityTooLarge()
        raw = environ["wsgi.input"].read(length) if length else b""
        if len(raw) != length:
            raise ClientDisconnected()
        return raw
    raw = http.get_data(cache=False)
    # A chunked body has no Content-Length: the stream stops quietly at the limit, so one
    # more byte from the server's stream is what tells a body over the limit from one
    # exactly at it.
    if limit is not None and len(raw) >= limit and environ["wsgi.input"].read(1):
        raise RequestEntityTooLarge()
    return raw


def content_length(environ) -> int | None:
    """``werkzeug.wsgi.get_content_length(environ)`` (what ``request.content_length`` reads):
    a header of at most 18 plain ASCII digits, with no Transfer-Encoding, is read directly
    (a longer one goes to werkzeug, which also words Python's limit on very long ones)."""
    text = environ.get("CONTENT_LENGTH")
    if text is not None and len(text) <= 18 and text.isdigit() and text.isascii() \
            and "HTTP_TRANSFER_ENCODING" not in environ:
        return int(text)
    return get_content_length(environ)


class _Oversized(Exception):
    """An object with more than ``MAX_OBJECT_MEMBERS`` members: parse again, the long way."""


def _plain_pairs(pairs):
    obj = dict(pairs)
    if len(obj) != len(pairs):
        _no_duplicates(pairs)  # raises, naming the first key met twice
    if len(obj) > MAX_OBJECT_MEMBERS:
        raise _Oversized
    return obj


_DECODERS = threading.local()


def _decoder() -> json.JSONDecoder:
    """This thread's decoder with :func:`_plain_pairs` (made once, not per body)."""
    decoder = getattr(_DECODERS, "decoder", None)
    if decoder is None:
        decoder = _DECODERS.decoder = json.JSONDecoder(
            object_pairs_hook=_plain_pairs, parse_constant=_reject_constant,
            parse_float=_finite_float)
    return decoder


def _parse(text: str):
    """The body's value, as :func:`_parse_fully` gives it. A body none of whose objects has
    more than ``MAX_OBJECT_MEMBERS`` members (almost all) is parsed once by a decoder made
    once; any other is parsed again by :func:`_parse_fully`, which judges it."""
    if text.startswith("\ufeff"):
        return _parse_fully(text)  # (json.loads words a byte order mark itself)
    try:
        return _decoder().decode(text)
    except _Oversized:
        return _parse_fully(text)


def _parse_fully(text: str):
    oversized = []

    def pairs_hook(pairs):
        obj = _no_duplicates(pairs)
        if len(obj) > MAX_OBJECT_MEMBERS:
            oversized.append(obj)
        return obj

    value = json.loads(text, object_pairs_hook=pairs_hook, parse_constant=_reject_constant,
                       parse_float=_finite_float)
    inner = [obj for obj in oversized if obj is not value]
    if inner:
        raise ProblemError(413, f"An object in the body has {len(inner[0])} members; an "
                                f"object below the top level may have at most "
                                f"{MAX_OBJECT_MEMBERS}.")
    return value


def media_type(environ=None) -> tuple[str, dict[str, str]]:
    """``(request.mimetype, request.mimetype_params)``, the Content-Type header parsed once
    per distinct header (most clients send one of a few); the parameters are not to be
    changed. ``environ``: the request's, where the caller holds it."""
    header = (request.environ if environ is None else environ).get("CONTENT_TYPE", "")
    found = _MEDIA_TYPES.get(header)
    if found is None:
        kind, params = parse_options_header(header)
        found = (kind.lower(), params)
        if len(header) <= 200:
            if len(_MEDIA_TYPES) >= 256:
                _MEDIA_TYPES.clear()
            _MEDIA_TYPES[header] = found
    return found


_MEDIA_TYPES: dict[str, tuple[str, dict[str, str]]] = {}


def json_body(media: tuple | None = None, http=None):
    """Return the parsed JSON body, or raise a 4xx problem saying what is wrong with it
    (``media``: :func:`media_type`, and ``http``: the request, where the caller has them)."""
    kind, params = media_type() if media is None else media
    if kind != "application/json":
        raise ProblemError(415, "Send the body as application/json.")
    charset = params.get("charset", "utf-8").lower()
    if charset not in ("utf-8", "utf8"):
        raise ProblemError(415, f"Send the body as UTF-8 JSON, not {charset}.")
    raw = _read_body(http)
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ProblemError(400, f"The body is not valid UTF-8 (byte {exc.start}).") from None
    try:
        return _parse(text)
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


# ---- validation that stops once enough errors are found ------------------------------------


class _Budget:
    """Error paths found so far in list elements, and list elements left unchecked."""

    def __init__(self, cap: int):
        self.cap = cap
        self.found = 0
        self.unchecked = 0

    @property
    def spent(self) -> bool:
        return self.found >= self.cap


_BUDGET: contextvars.ContextVar[_Budget | None] = contextvars.ContextVar("error_budget",
                                                                         default=None)


class _CappedList(fields.List):
    """``fields.List`` that stops taking elements once the error budget is spent.

    Element by element it does exactly what ``fields.List`` does; the elements it does not
    take are counted as unchecked and contribute no error.
    """

    def _deserialize(self, value, attr, data, **kwargs):
        budget = _BUDGET.get()
        if budget is None or not utils.is_collection(value):
            return super()._deserialize(value, attr, data, **kwargs)
        result = []
        errors = {}
        stopped = False
        for idx, each in enumerate(value):
            if budget.spent:
                budget.unchecked += len(value) - idx
                stopped = True
                break
            before = budget.found
            try:
                result.append(self.inner.deserialize(each, **kwargs))
            except ValidationError as error:
                if error.valid_data is not None:
                    result.append(error.valid_data)
                errors[idx] = error.messages
                # Lists inside the element counted their own paths: count the element's
                # paths once, in place of those.
                budget.found = before + len(flatten_errors(error.messages))
        if errors:
            raise ValidationError(errors, valid_data=result)
        if stopped:
            # Errors elsewhere already fail the request; this list says nothing (its own
            # validators would judge a list cut short).
            raise ValidationError({})
        return result


class RawItems(_CappedList):
    """A list of raw elements (``fields.List(fields.Raw())``, capped likewise), taken whole
    when it is a list without nulls: then every element passes ``fields.Raw``, which refuses
    only a null (the field has no validators)."""

    def __init__(self, **kwargs):
        super().__init__(fields.Raw(), **kwargs)

    def _deserialize(self, value, attr, data, **kwargs):
        if type(value) is list and not any(each is None for each in value):
            return list(value)
        return super()._deserialize(value, attr, data, **kwargs)


_TWINS: dict[type, type] = {}


def _twin_field(field: fields.Field) -> fields.Field | None:
    """Return a copy of ``field`` whose lists stop early, or None when nothing changes."""
    if type(field) is fields.List:
        twin = copy.deepcopy(field)
        twin.__class__ = _CappedList
        inner = _twin_field(field.inner)
        if inner is not None:
            twin.inner = inner
        return twin
    if type(field) is fields.Nested and isinstance(field.nested, type) and \
            issubclass(field.nested, Schema):
        twin = copy.deepcopy(field)
        twin.nested = _twin_class(field.nested)
        return twin
    return None


def _twin_class(schema_class: type) -> type:
    """The same schema with every plain ``List`` (at any depth) stopping early."""
    if schema_class not in _TWINS:
        overrides = {}
        for name, field in schema_class._declared_fields.items():
            twin = _twin_field(field)
            if twin is not None:
                overrides[name] = twin
        # Not registered by name: string references keep meaning the original schemas.
        overrides["Meta"] = type("Meta", (schema_class.Meta,), {"register": False})
        _TWINS[schema_class] = type(schema_class.__name__, (schema_class,), overrides)
    return _TWINS[schema_class]


def _twin(schema: Schema) -> Schema:
    return _twin_class(type(schema))(only=schema.only, exclude=schema.exclude,
                                     many=schema.many, partial=schema.partial,
                                     unknown=schema.unknown)


_TWIN_INSTANCES: "weakref.WeakKeyDictionary[Schema, Schema]" = weakref.WeakKeyDictionary()


def _twin_of(schema: Schema) -> Schema:
    twin = _TWIN_INSTANCES.get(schema)
    if twin is None:
        twin = _TWIN_INSTANCES[schema] = _twin(schema)
    return twin


def validate_capped(schema: Schema, data: dict, *, cap: int = MAX_ERROR_PATHS):
    """Load ``data`` with ``schema``, stopping once ``cap`` error paths are found.

    Returns ``(result, errors, omitted, unchecked)``: the loaded data (None when invalid),
    the first ``cap`` error paths in the order a full validation gives them, how many
    further paths were found, and how many list elements were never checked. Unknown
    top-level fields are listed after the others, in body order, and counted, not checked
    one by one.
    """
    twin = _twin_of(schema)
    hooks = twin._hooks[PRE_LOAD] or twin._hooks[VALIDATES_SCHEMA]
    unknown: list[str] = []
    if twin.unknown == RAISE and not hooks:
        known = {f.data_key or name for name, f in twin.load_fields.items()}
        unknown = [key for key in data if key not in known]
        if unknown:
            data = {key: value for key, value in data.items() if key in known}
    budget = _Budget(cap)
    token = _BUDGET.set(budget)
    try:
        result = twin.load(data)
        messages = {}
    except ValidationError as exc:
        result, messages = None, exc.messages
    finally:
        _BUDGET.reset(token)
    if not messages and not unknown:
        return result, {}, 0, 0
    errors: dict[str, list[str]] = {}
    omitted = 0
    for path, msgs in flatten_errors(messages).items():
        if len(errors) < cap:
            errors[path] = msgs
        else:
            omitted += 1
    message = twin.error_messages["unknown"]
    for n, key in enumerate(unknown):
        if key in errors:
            errors[key].append(message)
        elif len(errors) < cap:
            errors[key] = [message]
        else:
            omitted += len(unknown) - n
            break
    return None, errors, omitted, budget.unchecked


def load(schema: Schema, data):
    """Validate ``data`` with ``schema``; raise a 422 problem with field paths if it fails."""
    if not isinstance(data, dict):
        raise ProblemError(422, "The body must be a JSON object.", errors={"body": [
            "Must be an object."]})
    result, errors, omitted, unchecked = validate_capped(schema, data)
    if result is not None:
        return result
    detail = "The request has invalid fields."
    if unchecked:
        detail += (f" Checking stopped once {MAX_ERROR_PATHS} error paths were found: "
                   f"{unchecked} further list elements were not checked.")
    raise ProblemError(422, detail, errors=errors, errors_omitted=omitted)
