"""The application factory."""

import importlib

from flask import Flask

from service import create_app
from service.app import DEFAULT_TABLES
from service.bases import Registry


def fernhollow_folder(tmp_path):
    (tmp_path / "only.toml").write_text(
        'id = "fernhollow-only"\nversion = "2026.1"\ntitle = "Fernhollow Mutual test basis"\n'
        'status = "demo"\nsource = "Invented for the tests"\n\n'
        '[interest]\nkind = "flat"\nrate = 0.03\n\n'
        '[mortality.unisex]\nlaw = "gompertz"\nparameters = { B = 0.00003, c = 1.1 }\n'
        'min_age = 40\nsource = "Invented law parameters"\n', encoding="utf-8")
    return tmp_path


def test_config_override_wins(tmp_path, monkeypatch):
    monkeypatch.delenv("ANNUITY_TABLES_DIR", raising=False)
    monkeypatch.delenv("ANNUITY_REQUIRED_BASES", raising=False)
    app = create_app({"TESTING": True, "TABLES_DIR": str(fernhollow_folder(tmp_path)),
                      "MAX_ITEMS": 5, "MAX_CONTENT_LENGTH": 1000,
                      "REQUIRED_BASES": ("fernhollow-only",)})
    assert isinstance(app, Flask)
    assert app.config["MAX_ITEMS"] == 5
    assert app.config["MAX_CONTENT_LENGTH"] == 1000
    registry = app.extensions["registry"]
    assert isinstance(registry, Registry)
    assert list(registry.bases) == [("fernhollow-only", "2026.1")]
    client = app.test_client()
    assert client.get("/readyz").status_code == 200
    assert [b["id"] for b in client.get("/v1/bases").get_json()["bases"]] == ["fernhollow-only"]


def test_defaults_serve_the_shipped_tables(monkeypatch):
    monkeypatch.delenv("ANNUITY_TABLES_DIR", raising=False)
    app = create_app()
    assert app.config["TABLES_DIR"] == str(DEFAULT_TABLES)
    assert app.config["MAX_ITEMS"] == 10_000
    assert app.extensions["registry"].resolve("standard-ultimate").id == "standard-ultimate"


def test_environment_is_read_and_config_beats_it(tmp_path, monkeypatch):
    folder = fernhollow_folder(tmp_path)
    monkeypatch.setenv("ANNUITY_TABLES_DIR", str(folder))
    monkeypatch.setenv("ANNUITY_REQUIRED_BASES", " fernhollow-only , standard-ultimate,")
    from_env = create_app({"TESTING": True})
    assert list(from_env.extensions["registry"].bases) == [("fernhollow-only", "2026.1")]
    assert from_env.config["REQUIRED_BASES"] == ("fernhollow-only", "standard-ultimate")
    assert from_env.test_client().get("/readyz").status_code == 503
    overridden = create_app({"TESTING": True, "TABLES_DIR": str(DEFAULT_TABLES),
                             "REQUIRED_BASES": ()})
    assert ("standard-ultimate", "2026.1") in overridden.extensions["registry"].bases


def test_each_app_has_its_own_registry(tmp_path):
    first = create_app({"TESTING": True})
    second = create_app({"TESTING": True, "TABLES_DIR": str(fernhollow_folder(tmp_path))})
    assert first.extensions["registry"] is not second.extensions["registry"]
    assert ("standard-ultimate", "2026.1") in first.extensions["registry"].bases
    assert ("standard-ultimate", "2026.1") not in second.extensions["registry"].bases


def test_wsgi_module_holds_no_app_object():
    wsgi = importlib.import_module("service.wsgi")
    assert callable(wsgi.create_app)
    assert not [name for name, value in vars(wsgi).items() if isinstance(value, Flask)]
    assert not hasattr(wsgi, "app") and not hasattr(wsgi, "application")
