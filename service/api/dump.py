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

import logging
from collections.abc import Callable

from marshmallow import Schema, fields

log = logging.getLogger(__name__)

#: Raise on an undeclared key (set by the test suite); otherwise drop it and log.
STRICT = False

_DUMPERS: dict[type, Callable[[dict], dict]] = {}
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
    """``body`` as ``schema`` declares it."""
    return dumper(schema)(body)


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
        return compiled[0](value)

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

    def run(body: dict) -> dict:
        out = {}
        for key in order:
            if key in body:
                value = body[key]
                entry = nested_keys.get(key)
                if entry is not None and value is not None:
                    fn, many = entry
                    value = [fn(v) for v in value] if many else fn(value)
                out[key] = value
        if len(out) != len(body):
            _undeclared(name, set(body) - known)
        return out

    return run


def _undeclared(schema: str, keys: set) -> None:
    message = f"{schema} does not declare {', '.join(sorted(map(str, keys)))}"
    if STRICT:
        raise UndeclaredField(message)
    if schema not in _WARNED:
        _WARNED.add(schema)
        log.error("response drift: %s (dropped)", message)
