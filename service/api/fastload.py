"""Loading plain batch items quickly, with the marshmallow schema still the judge.

A batch of 10,000 items loaded through marshmallow builds and walks a tree of schema and
field calls per item; most of the time goes on that machinery, not on the checks. A
:class:`FastLoader` is compiled once from an item schema's own fields, validators and hooks
(nothing is restated here: types, ranges, choices, lengths, patterns, defaults, required
fields and unknown fields come from the field objects; the schema-level validators and the
post-load hooks are the schema's own methods, called as marshmallow calls them). For each
item it either returns exactly what ``schema.load(item)`` returns, or None: "not sure". It
is conservative by construction: it accepts only values of the plain JSON types it knows
the field's answer for, and any doubt (a wrong type, a boolean for a number, a value out of
range, an unknown field, a failing schema validator) answers None, after which the caller
loads that item through marshmallow, which accepts it or words the problems as always.

Fields of a kind not recognised here are deserialised by the field object itself
(``field.deserialize``), so a schema may grow new field types without this module learning
them; a schema using a marshmallow feature not handled here (pre-load hooks, field
validators by name, ``attribute``, partial loading, ``unknown`` other than RAISE, field-level
pre/post-load functions) is not compiled at all and every item goes through marshmallow.
"""

import weakref
from collections.abc import Callable

from marshmallow import RAISE, Schema, ValidationError, fields, missing, validate
from marshmallow.decorators import POST_LOAD, PRE_LOAD, VALIDATES, VALIDATES_SCHEMA

from service.api.schemas import StrictFloat

#: "Not sure": the value is not one this module can vouch for.
_NO = object()


class _Unsupported(Exception):
    """The schema uses something this module does not reproduce."""


def _check_of(validator) -> Callable[[object], bool]:
    """A predicate that is true exactly when ``validator`` would pass the value."""
    kind = type(validator)
    if kind is validate.Range:
        lo, hi = validator.min, validator.max
        lo_in, hi_in = validator.min_inclusive, validator.max_inclusive
        if lo is not None and hi is not None:
            if lo_in and hi_in:
                return lambda x: lo <= x <= hi
            if hi_in:
                return lambda x: lo < x <= hi
            if lo_in:
                return lambda x: lo <= x < hi
            return lambda x: lo < x < hi
    if kind is validate.OneOf:
        choices = validator.choices
        try:
            members = frozenset(choices)
        except TypeError:
            members = None
        if members is not None and all(type(c) is str for c in members):
            return lambda x: type(x) is str and x in members
    if kind is validate.Length and validator.equal is None:
        lo, hi = validator.min, validator.max
        lo = 0 if lo is None else lo
        if hi is None:
            return lambda x: lo <= len(x)
        return lambda x: lo <= len(x) <= hi

    def general(x):
        try:
            return validator(x) is not False
        except ValidationError:
            return False

    return general


def _checked(convert, checks):
    """``convert`` followed by the field's validators (all must pass)."""
    if not checks:
        return convert
    if len(checks) == 1:
        (check,) = checks

        def one(v):
            x = convert(v)
            # None (where the field allows it) skips the validators, as in marshmallow.
            return x if x is _NO or x is None or check(x) else _NO

        return one

    def every(v):
        x = convert(v)
        if x is _NO or x is None:
            return x
        for check in checks:
            if not check(x):
                return _NO
        return x

    return every


def _strict_float(allow_none: bool):
    def convert(v):
        kind = type(v)
        if kind is float:
            return v if v - v == 0.0 else _NO  # finite: inf - inf and nan are nan
        if kind is int:
            try:
                return float(v)
            except OverflowError:
                return _NO
        if v is None and allow_none:
            return None
        return _NO

    return convert


def _strict_integer(allow_none: bool):
    def convert(v):
        if type(v) is int:
            return v
        if v is None and allow_none:
            return None
        return _NO

    return convert


def _string(allow_none: bool):
    def convert(v):
        if type(v) is str:
            return v
        if v is None and allow_none:
            return None
        return _NO

    return convert


def _by_field(field: fields.Field, name: str | None):
    """The field's own deserialisation (for kinds not reproduced here): as a schema calls it
    (with its name and the item) or, with no name, as a list calls it for an element."""
    deserialize = field.deserialize
    if name is None:

        def element(v):
            try:
                return deserialize(v)
            except ValidationError:
                return _NO

        return element

    def convert(v, item):
        try:
            return deserialize(v, name, item)
        except ValidationError:
            return _NO

    return convert


def _none_ok(convert, allow_none: bool):
    """Wrap a converter that does not itself handle None as marshmallow does."""
    if not allow_none:
        return lambda v: _NO if v is None else convert(v)

    return lambda v: None if v is None else convert(v)


def _converter(field: fields.Field, name: str | None):
    """Return ``(convert, wants_item)``: ``convert(value)`` gives what ``field.deserialize``
    gives for a present value, or ``_NO``; ``wants_item`` when it must also see the item.
    ``name`` is the field's key in its schema, None for a list's elements."""
    if getattr(field, "pre_load", None) or getattr(field, "post_load", None):
        raise _Unsupported(f"{name}: field-level load functions")
    allow_none = field.allow_none
    kind = type(field)
    checks = [_check_of(v) for v in field.validators]
    if kind is StrictFloat:
        # StrictFloat: a JSON number (not a boolean), finite, as a float.
        base = _strict_float(allow_none)
    elif kind is fields.Integer and field.strict:
        base = _strict_integer(allow_none)
    elif kind is fields.String:
        base = _string(allow_none)
    elif kind is fields.Nested and isinstance(field.schema, Schema) and not field.many \
            and field.unknown is None:
        base = _none_ok(_compile(field.schema).load_or_no, allow_none)
    elif kind is fields.List:
        inner, _ = _converter(field.inner, None)

        def listed(v):
            if type(v) is not list:
                return _NO
            out = []
            for each in v:
                x = inner(each)
                if x is _NO:
                    return _NO
                out.append(x)
            return out

        base = _none_ok(listed, allow_none)
    else:
        return _by_field(field, name), name is not None
    return _checked(base, checks), False


def _fields_function(plan, known: frozenset):
    """Compile ``fields(item)``: the item's fields loaded (in the schema's field order, as
    marshmallow builds its result), or ``_NO``. One straight-line block per field: a missing
    field takes its default (or is left out, or makes the item "not sure" if required); a
    present one goes through its converter."""
    namespace = {"_NO": _NO, "missing": missing, "dict": dict, "type": type, "known": known}
    lines = ["def fields(item):",
             "    if type(item) is not dict or not known.issuperset(item):",
             "        return _NO",
             "    get = item.get",
             "    out = {}"]
    for n, (key, attr, convert, wants_item, required, default, call) in enumerate(plan):
        namespace[f"convert_{n}"], namespace[f"default_{n}"] = convert, default
        lines += [f"    value = get({key!r}, missing)",
                  "    if value is missing:"]
        if required:
            lines.append("        return _NO")
        elif default is missing:
            lines.append("        pass")
        else:
            lines.append(f"        out[{attr!r}] = default_{n}{'()' if call else ''}")
        lines += ["    else:",
                  f"        value = convert_{n}(value{', item' if wants_item else ''})",
                  "        if value is _NO:",
                  "            return _NO",
                  "        if value is not missing:",
                  f"            out[{attr!r}] = value"]
    lines.append("    return out")
    exec(compile("\n".join(lines), f"<fast loader of {len(plan)} fields>", "exec"),  # noqa: S102
         namespace)
    return namespace["fields"]


class FastLoader:
    """``load(item)``: what ``schema.load(item)`` returns, or None when not sure."""

    def __init__(self, schema: Schema):
        hooks = schema._hooks
        if hooks[PRE_LOAD] or hooks[VALIDATES]:
            raise _Unsupported("pre-load hooks or field validators")
        if schema.unknown != RAISE or schema.partial or schema.many \
                or schema.dict_class is not dict:
            raise _Unsupported("schema options")
        plan = []
        for attr, field in schema.load_fields.items():
            if field.attribute is not None:
                raise _Unsupported(f"{attr}: attribute")
            key = field.data_key if field.data_key is not None else attr
            convert, wants_item = _converter(field, key)
            default = field.load_default
            plan.append((key, attr, convert, wants_item, field.required, default,
                         callable(default)))
        self._fields = _fields_function(plan, frozenset(key for key, *_ in plan))
        # marshmallow runs the collection validators first, then the others; with one item
        # both see the same data.
        self._validators = tuple(
            (getattr(schema, name), kwargs.get("pass_original", False))
            for collection in (True, False)
            for name, many, kwargs in hooks[VALIDATES_SCHEMA] if many is collection)
        self._post_load = tuple(
            (getattr(schema, name), kwargs.get("pass_original", False))
            for collection in (True, False)
            for name, many, kwargs in hooks[POST_LOAD] if many is collection)
        self._partial, self._unknown = schema.partial, schema.unknown

    def load_or_no(self, item):
        """What ``schema.load(item)`` returns, or ``_NO``."""
        out = self._fields(item)
        if out is _NO:
            return _NO
        options = {"partial": self._partial, "many": False, "unknown": self._unknown}
        for validator, pass_original in self._validators:
            try:
                if pass_original:
                    validator(out, item, **options)
                else:
                    validator(out, **options)
            except ValidationError:
                return _NO
        for processor, pass_original in self._post_load:
            try:
                out = (processor(out, item, **options) if pass_original
                       else processor(out, **options))
            except ValidationError:
                return _NO
        return out

    def load(self, item) -> dict | None:
        """What ``schema.load(item)`` returns, or None when not sure."""
        out = self.load_or_no(item)
        return None if out is _NO else out


_LOADERS: "weakref.WeakKeyDictionary[Schema, FastLoader | None]" = weakref.WeakKeyDictionary()


def _compile(schema: Schema) -> FastLoader:
    loader = _LOADERS.get(schema, missing)
    if loader is missing:
        loader = _LOADERS[schema] = FastLoader(schema)
    if loader is None:
        raise _Unsupported(type(schema).__name__)
    return loader


def fast_loader(schema: Schema) -> FastLoader | None:
    """The schema's fast loader, compiled on first use; None if the schema uses something it
    does not reproduce (every item then goes through marshmallow)."""
    try:
        return _compile(schema)
    except _Unsupported:
        _LOADERS[schema] = None
        return None


def load_items(schema: Schema, items: list, *, stop_at_first: bool = False):
    """Load each item of a batch with ``schema``: fast where the fast loader vouches for it,
    else through ``schema.load``.

    Returns ``(loaded, places, errors)``: the loaded items, their places in ``items``, and
    ``{place: marshmallow's messages}`` for the items refused. With ``stop_at_first`` the
    loading stops at the first refused item (its messages are still given).
    """
    loader = fast_loader(schema)
    quick = loader.load_or_no if loader is not None else None
    loaded, places, errors = [], [], {}
    for n, item in enumerate(items):
        out = quick(item) if quick is not None else _NO
        if out is _NO:
            try:
                out = schema.load(item)
            except ValidationError as exc:
                errors[n] = exc.messages
                if stop_at_first:
                    break
                continue
        loaded.append(out)
        places.append(n)
    return loaded, places, errors
