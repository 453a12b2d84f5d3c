"""Shared test set-up. (The engine is imported as installed, or from the checkout through
pytest.ini's ``pythonpath``.)"""

import pytest


@pytest.fixture(autouse=True)
def own_calibration(tmp_path_factory, monkeypatch):
    """Each test starts with no per-machine calibration (engine.calibration) and never touches the
    developer's: a bake that records its speed (the add-on does) writes into this test's folder,
    so one test's bake cannot turn another test's estimate from rough into calibrated."""
    folder = tmp_path_factory.mktemp("calibration")  # not the test's own tmp_path, which some tests list
    monkeypatch.setenv("SPLASHDRAFT_CALIBRATION", str(folder / "calibration.json"))
