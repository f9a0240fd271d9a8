"""Test-wide settings: no test writes into the user's real run history."""

import os
import tempfile

import pytest


@pytest.fixture(autouse=True, scope="session")
def _private_history_location():
    # the default history lives under $XDG_DATA_HOME; point it at a throw-away folder for
    # this test session (subprocesses inherit the environment)
    with tempfile.TemporaryDirectory(prefix="filmmap-test-data-") as tmp:
        old = os.environ.get("XDG_DATA_HOME")
        os.environ["XDG_DATA_HOME"] = tmp
        yield tmp
        if old is None:
            os.environ.pop("XDG_DATA_HOME", None)
        else:
            os.environ["XDG_DATA_HOME"] = old
