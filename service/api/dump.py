"""Responses dumped through their marshmallow schemas, fast.

A response body leaves the service only through the schema the contract documents for it:
``dumper(SchemaClass)`` compiles the schema's declared fields (names, nested schemas, lists of
them) once into a plain function that copies those keys, in the schema's order, from the dict
a view built. A key the schema does not declare is a drift between the view and the contract:
under test (``STRICT``) it raises; in production it is dropped and logged once per schema.

Values are not converted: views already build JSON-ready values (floats, strings, ISO dates),
and converting 10,000 results field by field through marshmallow's own ``dump`` would cost
more than valuing them. The contract tests (schemathesis) check the values' types.
"""

import json
import logging
from collections.abc import Callable
from contextvars import ContextVar
from types import MappingProxyType

from flask import Response, current_app, jsonify
from marshmallow import Schema, fields

log = logging.getLogger(__name__)

#: Raise on an undeclared key (set by the test suite); otherwise drop it and log.
STRICT = False

_DUMPERS: dict[type, Callable[[dict], dict]] = {}
#: At most this many key sets are remembered per schema (more are planned each time).
_PLANS = 256
_WARNED: set[str] = set()


class UndeclaredField(ValueError):
    """A response held a key its schema does not declare."""


def dumper(schema: type[Schema] | Schema) -> Callable[[dict], dict]:
    """The compiled dump function of ``schema`` (a class or an instance)."""
    cls = schema if isinstance(schema, type) else type(schema)
    found = _DUMPERS.get(cls)
    if found is None:
        found = _DUMPERS[cls] = _compile(cls)
    return found


def dump(schema: type[Schema] | Schema, body: dict) -> dict:
    """``body`` as ``schema`` declares it. Within one call a nested object met again (the
    same object, as the method block most results share) is dumped once and its dump
    shared."""
    token = _SEEN.set({})
    try:
        return dumper(schema)(body)
    finally:
        _SEEN.reset(token)


#: The nested objects dumped so far in the current ``dump`` call: id -> (object, its dump).
_SEEN: ContextVar[dict | None] = ContextVar("dump_seen", default=None)
#: Read-only nested objects (``types.MappingProxyType``: the blocks the service makes once and
#: shares, as each basis' audit blocks) dumped so far by any call, as ``_SEEN`` (the object
#: is kept, so its id is not reused while it is here). Their dumps are shared too: nothing
#: changes a dump after it is made (it is encoded as it is).
_READ_ONLY: dict[int, tuple] = {}
_READ_ONLY_KEPT = 1024


def _nested(field: fields.Field):
    """``(dump, many)`` for a field holding a nested schema (or a list of them), else None."""
    if isinstance(field, fields.Nested):
        return _lazy(field), bool(field.many)
    if isinstance(field, fields.List) and isinstance(field.inner, fields.Nested):
        return _lazy(field.inner), True
    return None


def _lazy(field: fields.Nested) -> Callable[[dict], dict]:
    """The nested schema's dumper, compiled on first use (schemas may refer to each other)."""
    compiled: list[Callable[[dict], dict]] = []

    def run(value: dict) -> dict:
        if not compiled:
            compiled.append(dumper(field.nested if isinstance(field.nested, type)
                                   else type(field.schema)))
        if type(value) is MappingProxyType:
            seen = _READ_ONLY  # (kept from one call to the next)
        else:
            seen = _SEEN.get()
            if seen is None:
                return compiled[0](value)
        found = seen.get(id(value))
        if found is None or found[0] is not value or found[1] is not compiled[0]:
            if seen is _READ_ONLY and len(seen) >= _READ_ONLY_KEPT:
                seen.clear()
            found = seen[id(value)] = (value, compiled[0], compiled[0](value))
        return found[2]

    return run


def _compile(cls: type[Schema]) -> Callable[[dict], dict]:
    declared = cls._declared_fields
    plain: list[str] = []
    nested: list[tuple[str, Callable[[dict], dict], bool]] = []
    order: list[str] = []
    for name, field in declared.items():
        key = field.data_key or name
        order.append(key)
        inner = _nested(field)
        if inner is None:
            plain.append(key)
        else:
            nested.append((key, *inner))
    known = frozenset(order)
    nested_keys = {key: (fn, many) for key, fn, many in nested}
    name = cls.__name__

    plans: dict[tuple, tuple] = {}  # a body's keys -> (its keys in order, nested, undeclared)

    def plan_of(shape: tuple) -> tuple:
        present = set(shape)
        keys = tuple(key for key in order if key in present)
        inner = tuple((key, *nested_keys[key]) for key in keys if key in nested_keys)
        found = (keys, keys == shape, inner, present - known)
        if len(plans) < _PLANS:
            plans[shape] = found
        return found

    def run(body: dict) -> dict:
        # The keys of a body are put in the schema's order by a plan made once per set of
        # keys met (results of one kind share one).
        shape = tuple(body)
        plan = plans.get(shape)
        keys, in_order, inner, undeclared = plan if plan is not None else plan_of(shape)
        if undeclared:
            out = {key: body[key] for key in keys}
            _undeclared(name, undeclared)
        else:
            out = dict(body) if in_order else {key: body[key] for key in keys}
        for key, fn, many in inner:
            value = out[key]
            if value is not None:
                out[key] = [fn(v) for v in value] if many else fn(value)
        return out

    return run


def _undeclared(schema: str, keys: set) -> None:
    message = f"{schema} does not declare {', '.join(sorted(map(str, keys)))}"
    if STRICT:
        raise UndeclaredField(message)
    if schema not in _WARNED:
        _WARNED.add(schema)
        log.error("response drift: %s (dropped)", message)


def compact_encoder(app) -> json.JSONEncoder | None:
    """The encoder that writes ``jsonify``'s compact text under ``app``'s JSON options, kept on
    its JSON provider (``json.dumps`` with Flask's options makes one per call); None where
    jsonify indents (debug mode, or compact off)."""
    provider = app.json
    if provider.compact is False or (provider.compact is None and app.debug):
        return None
    options = (provider.default, provider.ensure_ascii, provider.sort_keys)
    kept = provider.__dict__.get(_ENCODER)
    if kept is None or kept[0] != options:
        # (check_circular off: an answer is a tree built by the views, never circular; on,
        # the encoder keeps a set of the objects it is inside. The text is the same.)
        kept = (options, json.JSONEncoder(separators=(",", ":"), default=options[0],
                                          ensure_ascii=options[1], sort_keys=options[2],
                                          check_circular=False))
        setattr(provider, _ENCODER, kept)
    return kept[1]


def json_response(body, app=None) -> Response:
    """``jsonify(body)``, byte for byte (``app``: the app answering, where the caller holds
    it)."""
    if app is None:
        app = current_app._get_current_object()
    encoder = compact_encoder(app)
    if encoder is None:
        return jsonify(body)  # indented
    return app.response_class(f"{encoder.encode(body)}\n", mimetype=app.json.mimetype)


#: The attribute of a JSON provider that keeps its compact encoder and the options it has.
_ENCODER = "_annuity_service_compact_encoder"
