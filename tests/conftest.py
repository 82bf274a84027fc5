"""Shared fixtures: the app built with the factory over the shipped tables."""

import os

import pytest
from hypothesis import settings

from service import create_app
from service.api import dump

# A response key its schema does not declare fails the test that meets it.
dump.STRICT = True

# In CI every property test draws the same examples, so a red run can be replayed exactly;
# locally they vary from run to run and find new cases.
settings.register_profile("ci", derandomize=True, database=None)
if os.environ.get("CI"):
    settings.load_profile("ci")


@pytest.fixture(scope="session")
def app():
    return create_app({"TESTING": True})


@pytest.fixture()
def client(app):
    return app.test_client()


@pytest.fixture()
def registry(app):
    return app.extensions["registry"]
