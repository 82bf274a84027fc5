"""Responses leave through their schemas: the compiled dump keeps exactly the declared keys,
in the schema's order, through nested schemas and lists of them."""

import pytest
from marshmallow import Schema, fields

from service.api import dump as dump_module
from service.api.dump import UndeclaredField, dump


class Inner(Schema):
    a = fields.Float()
    b = fields.String(data_key="bee")


class Outer(Schema):
    z = fields.Integer()
    inner = fields.Nested(Inner, allow_none=True)
    many = fields.List(fields.Nested(Inner))
    plain = fields.Dict()


def test_declared_keys_in_the_schema_order_through_nesting():
    body = {"plain": {"x": [1]}, "many": [{"bee": "q", "a": 1.5}], "inner": None, "z": 3}
    out = dump(Outer, body)
    assert list(out) == ["z", "inner", "many", "plain"]
    assert out == body
    assert list(out["many"][0]) == ["a", "bee"]


def test_an_undeclared_key_raises_under_test_and_is_dropped_otherwise(monkeypatch, caplog):
    body = {"z": 1, "inner": {"a": 1.0, "extra": 2}}
    monkeypatch.setattr(dump_module, "STRICT", True)
    with pytest.raises(UndeclaredField, match="Inner does not declare extra"):
        dump(Outer, body)
    monkeypatch.setattr(dump_module, "STRICT", False)
    assert dump(Outer, body) == {"z": 1, "inner": {"a": 1.0}}
    assert "response drift" in caplog.text


def test_the_real_factor_response_dumps_as_it_is(client):
    from service.api.schemas import FactorResponseSchema

    body = client.post("/v1/annuity-factors", json={
        "basis": "standard-ultimate", "items": [
            {"id": "a", "lives": [{"age": 65}], "timing": "advance", "spread": {},
             "measures": ["duration"]},
            {"lives": [{"age": 300}], "timing": "advance"}], "on_error": "per-item"}).get_json()
    assert dump(FactorResponseSchema, body) == body


def _by_hand(cls, body):
    """The dump as the module's rule states it, walked field by field from the schema: the
    declared keys present, in declaration order, nested schemas followed."""
    out = {}
    for name, field in cls._declared_fields.items():
        key = field.data_key or name
        if key not in body:
            continue
        value = body[key]
        if value is not None and isinstance(field, fields.Nested):
            value = _by_hand(field.nested, value)
        elif value is not None and isinstance(field, fields.List) \
                and isinstance(field.inner, fields.Nested):
            value = [_by_hand(field.inner.nested, v) for v in value]
        out[key] = value
    return out


def test_bodies_of_many_shapes_and_shared_nested_objects_dump_as_walked_by_hand(monkeypatch):
    """Each set of keys is planned once and a nested object met again is dumped once: the
    dumps are still those of the rule, key order included, and the input is left alone."""
    shared = {"bee": "s", "a": 2.0}
    shapes = [{"z": 1, "inner": shared}, {"inner": shared, "z": 2},
              {"many": [shared, shared, {"a": 0.5}], "inner": shared},
              {"plain": {"k": 1}}, {}, {"inner": None, "many": []}]
    monkeypatch.setattr(dump_module, "STRICT", False)  # undeclared keys dropped
    monkeypatch.setattr(dump_module, "_DUMPERS", {})
    for n in range(700):  # more key sets than are remembered are planned each time
        body = shapes[n % len(shapes)] | ({f"x{n}": 1} if n % 2 else {})
        before = repr(body)
        if any(k.startswith("x") for k in body):
            assert dump(Outer, body) == _by_hand(Outer, body)
        else:
            out = dump(Outer, body)
            assert out == _by_hand(Outer, body)
            assert repr(out) == repr(_by_hand(Outer, body))  # the same order at every depth
        assert repr(body) == before


def test_a_shared_block_is_dumped_once_per_call(monkeypatch):
    calls = []
    inner = dump_module.dumper(Inner)
    monkeypatch.setitem(dump_module._DUMPERS, Inner, lambda body: calls.append(1) or
                        inner(body))
    dump_module._DUMPERS.pop(Outer, None)  # recompiled against the counting dumper
    try:
        shared = {"a": 1.0}
        out = dump(Outer, {"many": [shared] * 5 + [{"a": 1.0}], "inner": shared})
        assert len(calls) == 2 and out["many"][0] == shared
        dump(Outer, {"inner": shared})
        assert len(calls) == 3  # not remembered across calls
    finally:
        dump_module._DUMPERS.pop(Outer, None)


def test_a_read_only_block_is_dumped_once_across_calls(monkeypatch):
    # A MappingProxyType (the blocks the service makes once and shares, as a basis' audit
    # blocks) is dumped once and its dump reused by later calls; a plain dict is not.
    from types import MappingProxyType

    calls = []
    inner = dump_module.dumper(Inner)
    monkeypatch.setitem(dump_module._DUMPERS, Inner, lambda body: calls.append(1) or
                        inner(body))
    monkeypatch.setattr(dump_module, "_READ_ONLY", {})
    dump_module._DUMPERS.pop(Outer, None)  # recompiled against the counting dumper
    try:
        block = MappingProxyType({"bee": "x", "a": 2.0})
        first = dump(Outer, {"inner": block, "many": [block]})
        again = dump(Outer, {"inner": block})
        assert len(calls) == 1
        assert first["inner"] == again["inner"] == {"a": 2.0, "bee": "x"}
        assert list(again["inner"]) == ["a", "bee"]
        other = MappingProxyType({"a": 3.0})  # another object: its own dump
        assert dump(Outer, {"inner": other})["inner"] == {"a": 3.0}
        assert len(calls) == 2
    finally:
        dump_module._DUMPERS.pop(Outer, None)
