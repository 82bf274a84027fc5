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
