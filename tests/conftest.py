"""Shared fixtures: the app built with the factory over the shipped tables."""

import pytest

from service import create_app


@pytest.fixture(scope="session")
def app():
    return create_app({"TESTING": True})


@pytest.fixture()
def client(app):
    return app.test_client()


@pytest.fixture()
def registry(app):
    return app.extensions["registry"]
