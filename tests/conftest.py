"""Shared test set-up: make the repository root importable so ``import engine`` works."""

import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

import pytest  # noqa: E402


@pytest.fixture(autouse=True)
def own_calibration(tmp_path_factory, monkeypatch):
    """Each test starts with no per-machine calibration (engine.calibration) and never touches the
    developer's: a bake that records its speed (the add-on does) writes into this test's folder,
    so one test's bake cannot turn another test's estimate from rough into calibrated."""
    folder = tmp_path_factory.mktemp("calibration")  # not the test's own tmp_path, which some tests list
    monkeypatch.setenv("SPLASHDRAFT_CALIBRATION", str(folder / "calibration.json"))
