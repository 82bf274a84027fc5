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

import math
import weakref
from collections.abc import Callable

import numpy as np
from marshmallow import RAISE, Schema, ValidationError, fields, missing, validate
from marshmallow.decorators import POST_LOAD, PRE_LOAD, VALIDATES, VALIDATES_SCHEMA

from service.api.body import RawItems
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
    elif kind is RawItems:
        # Its own _deserialize: a list without nulls is taken whole (the elements are Raw).
        def raw(v):
            if type(v) is list and not any(each is None for each in v):
                return list(v)
            return _NO

        base = _none_ok(raw, allow_none)
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


# ---------------------------------------------------------------------------------------------
# Whole batches: fields checked as columns
#
# A batch's items mostly share one plain shape: scalar fields (numbers, strings) and a list of
# one nested object of scalar fields. For such items each field is gathered across the batch
# once and checked as a column: numbers by type and by their fields' Range validators on a
# numpy array, strings by checking each distinct value once with the field's own converter
# (the per-item loader's). The schema-level validators and post-load hooks take part only if
# each declares ``batch_suspects(columns, size)``: a boolean mask that is a superset of the
# items it could refuse or change. Any item out of the plain shape, failing a check, or a
# suspect of a hook is loaded one by one as before (the per-item fast loader, else
# marshmallow), which keeps every error path and message.

_NUMBER_TYPES = frozenset((float, int))


class _Column:
    """One scalar field checked across a batch."""

    def __init__(self, key: str, attr: str, field: fields.Field):
        self.key, self.attr = key, attr
        self.required, self.default = field.required, field.load_default
        self.call = callable(self.default)
        self.allow_none = field.allow_none
        kind = type(field)
        ranges = []
        for v in field.validators:
            if type(v) is not validate.Range or v.min is None or v.max is None:
                ranges = None
                break
            ranges.append(v)
        if kind is StrictFloat and ranges is not None:
            self.kind, self.ranges, self.types = "float", ranges, (float, int, _MISSING)
        elif kind is fields.Integer and field.strict and ranges is not None:
            self.kind, self.ranges, self.types = "int", ranges, (int, _MISSING)
        elif kind is fields.Date and not field.validators:
            # A date: each distinct string read once by the field itself (an ISO date as
            # marshmallow reads it), the items given the dates it gives.
            self.kind, self.types = "date", (str, _MISSING)
            self.convert = _by_field(field, None)
        elif kind is fields.String:
            self.kind, self.types = "str", (str, _MISSING)
            self.convert = _converter(field, key)[0]
            # Lengths only (an id): checked on the array of lengths, not value by value.
            self.lengths = [(v.min or 0, math.inf if v.max is None else v.max)
                            for v in field.validators] if field.validators and all(
                type(v) is validate.Length and v.equal is None
                for v in field.validators) else None
        else:
            raise _Unsupported(f"{key}: not a column")

    def check(self, items: list) -> tuple[list | None, np.ndarray]:
        """The loaded values of the items' field (``missing`` where absent with no default;
        None where refused), or None when no item gives it and it has no default; and the
        mask of the items whose value is not vouched for."""
        size = len(items)
        bad = np.zeros(size, dtype=bool)
        key, default = self.key, self.default
        plain_default = not self.call and default is not missing
        # (a default is put in place before the checks: a valid default passes them, and an
        # invalid one only sends its items one by one)
        values = [item.get(key, default if plain_default else missing) for item in items]
        kinds = set(map(type, values))
        if kinds == {_MISSING}:
            if self.required:
                bad[:] = True
            return None, bad
        if _MISSING in kinds:
            absent = [n for n, v in enumerate(values) if v is missing]
            if self.required:
                bad[absent] = True
            elif self.call:
                for n in absent:
                    values[n] = default()
        ok_types = set(self.types)
        if self.allow_none:
            ok_types.add(type(None))
        if not kinds <= ok_types:
            for n, v in enumerate(values):
                if type(v) not in ok_types:
                    bad[n] = True
                    values[n] = None
            kinds = (kinds & ok_types) | {type(None)}
        if self.kind == "str" and self.lengths is not None and kinds <= {str}:
            sizes = np.fromiter(map(len, values), dtype=np.int64, count=size)
            for lo, hi in self.lengths:
                bad |= (sizes < lo) | (sizes > hi)
            return values, bad
        if self.kind == "date":
            read = {v: self.convert(v) for v in set(values) if type(v) is str}
            for n, v in enumerate(values):
                if type(v) is str:
                    x = read[v]
                    if x is _NO:
                        bad[n] = True
                        x = None
                    values[n] = x
            return values, bad
        if self.kind == "str":
            verdict = {v: self.convert(v) is not _NO for v in set(values) if type(v) is str}
            if not all(verdict.values()):
                for n, v in enumerate(values):
                    if type(v) is str and not verdict[v]:
                        bad[n] = True
            return values, bad
        blank = _MISSING in kinds or type(None) in kinds
        numbers = values if not blank else [
            0 if v is None or v is missing else v for v in values]
        try:
            x = np.array(numbers, dtype=float)
        except OverflowError:
            x = np.array([float(v) if -2 ** 60 < v < 2 ** 60 else math.nan for v in numbers])
        none = np.array([v is None or v is missing for v in values], dtype=bool) if blank \
            else False
        with np.errstate(invalid="ignore"):
            fine = np.isfinite(x) | none
            if self.kind == "int":
                fine &= (np.abs(x) < 2.0 ** 53) | none
            for r in self.ranges:
                lo = x >= r.min if r.min_inclusive else x > r.min
                hi = x <= r.max if r.max_inclusive else x < r.max
                fine &= (lo & hi) | none
        if not fine.all():  # (the hooks see None for a value refused)
            bad |= ~fine
            for n in np.flatnonzero(~fine).tolist():
                values[n] = None
        if self.kind == "float" and int in kinds:
            values = [float(v) if type(v) is int else v for v in values]
        return values, bad


_MISSING = type(missing)


class _BatchPlan:
    """A schema's items loaded as columns (see above); built only where the schema allows."""

    def __init__(self, schema: Schema, loader: FastLoader):
        self.loader = loader
        self.columns: list[_Column] = []
        self.nested: tuple[str, str, _BatchPlan] | None = None
        self.others: dict[str, object] = {}  # fields outside the plain shape: their defaults
        order = []
        for attr, field in schema.load_fields.items():
            key = field.data_key if field.data_key is not None else attr
            if type(field) is fields.List and type(field.inner) is fields.Nested \
                    and isinstance(field.inner.schema, Schema) and self.nested is None \
                    and field.required and not field.allow_none \
                    and all(_check_of(v)([None]) for v in field.validators):
                inner = fields_plan(field.inner.schema)
                if inner is None:
                    raise _Unsupported(f"{key}: nested schema")
                self.nested = (key, attr, inner)
                order.append(("nested", attr))
                continue
            try:
                self.columns.append(_Column(key, attr, field))
                order.append(("column", attr))
            except _Unsupported:
                if field.required:
                    raise
                self.others[attr] = field.load_default
                order.append(("other", attr))
        self.order = order
        self.keys = frozenset(c.key for c in self.columns) | (
            {self.nested[0]} if self.nested else set())
        hooks = []
        for method, _ in (*loader._validators, *loader._post_load):
            suspects = getattr(method, "batch_suspects", None)
            if suspects is None:
                raise _Unsupported(f"{method.__name__}: no batch_suspects")
            hooks.append(suspects)
        self.hooks = tuple(hooks)

    def load(self, items: list) -> tuple[list, np.ndarray]:
        """Loaded items (None where not vouched for) and the mask of those not vouched for.
        ``items`` are dicts."""
        size = len(items)
        keys = self.keys
        bad = np.array([not keys.issuperset(item) for item in items], dtype=bool)
        loaded: dict[str, list] = {}
        for col in self.columns:
            values, wrong = col.check(items)
            bad |= wrong
            if values is not None:
                loaded[col.attr] = values
        if self.nested is not None:
            key, attr, inner = self.nested
            outer = [item.get(key) for item in items]
            shaped = [type(v) is list and len(v) == 1 and type(v[0]) is dict for v in outer]
            if not all(shaped):
                bad |= ~np.array(shaped, dtype=bool)
                outer = [v if ok else [{}] for v, ok in zip(outer, shaped, strict=True)]
            lives, wrong = inner.load([v[0] for v in outer])
            bad |= wrong
            loaded[attr] = [[life] for life in lives]
        for attr, default in self.others.items():
            if callable(default):
                loaded[attr] = [default() for _ in range(size)]
            elif default is not missing:
                loaded[attr] = [default] * size
        for suspects in self.hooks:
            bad |= np.asarray(suspects(loaded, size), dtype=bool)
        names = tuple(attr for _, attr in self.order if attr in loaded)
        gaps = [attr for attr in names if _MISSING in set(map(type, loaded[attr]))]
        if not gaps:
            out = list(map(_builder(names), *[loaded[attr] for attr in names]))
            for n in np.flatnonzero(bad).tolist():
                out[n] = None
        else:
            rows = zip(*[loaded[attr] for attr in names], strict=True)
            out = [None if b else {k: v for k, v in zip(names, row, strict=True)
                                   if v is not missing}
                   for row, b in zip(rows, bad.tolist(), strict=True)]
        return out, bad


_BUILDERS: dict[tuple, Callable] = {}


def _builder(names: tuple) -> Callable:
    """``f(*values)``: the dict of ``names`` to ``values`` (compiled once per key set)."""
    found = _BUILDERS.get(names)
    if found is None:
        args = ", ".join(f"v{n}" for n in range(len(names)))
        body = ", ".join(f"{name!r}: v{n}" for n, name in enumerate(names))
        found = eval(f"lambda {args}: {{{body}}}")  # noqa: S307 (names: the schema's fields)
        if len(_BUILDERS) < 64:
            _BUILDERS[names] = found
    return found


_PLANS: "weakref.WeakKeyDictionary[Schema, _BatchPlan | None]" = weakref.WeakKeyDictionary()


def fields_plan(schema: Schema) -> "_BatchPlan | None":
    """The schema's batch plan, or None where it cannot have one."""
    plan = _PLANS.get(schema, missing)
    if plan is missing:
        loader = fast_loader(schema)
        try:
            plan = None if loader is None else _BatchPlan(schema, loader)
        except _Unsupported:
            plan = None
        _PLANS[schema] = plan
    return plan


def load_batch(schema: Schema, items: list, *, stop_at_first: bool = False):
    """As :func:`load_items` (the same answer), with the items of the plain shape checked as
    columns and the others loaded one by one."""
    plan = fields_plan(schema)
    if plan is None or len(items) < 2:
        return load_items(schema, items, stop_at_first=stop_at_first)
    dicts = [n for n, item in enumerate(items) if type(item) is dict]
    quick, _ = plan.load([items[n] for n in dicts])
    done = dict(zip(dicts, quick, strict=True))
    loaded, places, errors = [], [], {}
    rest = [n for n in range(len(items)) if done.get(n) is None]
    if rest:
        more, kept, errors = load_items(schema, [items[n] for n in rest],
                                        stop_at_first=stop_at_first)
        for k, out in zip(kept, more, strict=True):
            done[rest[k]] = out
        errors = {rest[k]: msgs for k, msgs in errors.items()}
    stop = min(errors) if errors and stop_at_first else len(items)
    for n in range(stop):
        out = done.get(n)
        if out is not None:
            loaded.append(out)
            places.append(n)
    return loaded, places, errors
