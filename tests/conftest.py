"""Shared test set-up: make the repository root importable so ``import engine`` works."""

import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

# Tests never read or write the developer's per-machine calibration (engine.calibration); a test
# that wants one sets its own path.
import os  # noqa: E402
import tempfile  # noqa: E402

os.environ["SPLASHDRAFT_CALIBRATION"] = os.path.join(tempfile.mkdtemp(prefix="splashdraft_test_"), "none.json")
