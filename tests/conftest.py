"""Shared test set-up.

Tests never read or write the developer's per-machine calibration (engine.calibration): each test
gets its own empty calibration path, so a bake in one test (the add-on records a calibration after
a bake) cannot change another test's estimate; a test that wants a calibration writes its own.
(The engine is imported as installed, or from the checkout through pytest.ini's ``pythonpath``.)
"""

import os
import tempfile

import pytest

os.environ["SPLASHDRAFT_CALIBRATION"] = os.path.join(tempfile.mkdtemp(prefix="splashdraft_test_"), "none.json")


@pytest.fixture(autouse=True)
def _own_calibration(tmp_path_factory, monkeypatch):
    monkeypatch.setenv("SPLASHDRAFT_CALIBRATION", str(tmp_path_factory.mktemp("calibration") / "none.json"))
