"""engine.calibration: this computer's bake speed, measured, kept per machine, used by the estimate.

Oracles: the time model's arithmetic on a manifest written here (rate = sum of particles x steps
over the frames after the first, divided by their seconds; start-up = wall time less those
seconds), and a real bake of the calibration shot through engine.bake, whose manifest the kept
figures must reproduce. How close the estimate comes to real bake times is a benchmark
(bench/bench_estimate.py --time), not a unit test (house rule: no timed unit tests).
"""

import json

import pytest

from engine import calibration
from engine.cache import open_cache
from engine.estimate import quick_estimate


def manifest(frames):
    return {"scene_name": "shot", "frames": {str(f): {"particles": n, "substeps": s, "seconds": t}
                                             for f, (n, s, t) in frames.items()}}


def test_figures_follow_the_time_model():
    """Frames 2 and 3: 1000 x 10 and 1200 x 12 particle-steps in 0.5 + 0.7 s -> 24,400 / 1.2 =
    20,333 particle-steps/s; the bake took 2.0 s, of which 1.2 s were frames after the first, so
    0.8 s start-up. Frame 1 (the initial state) is start-up, whatever its own record says."""
    rate, startup = calibration.figures_from_manifest(
        manifest({1: (1000, 0, 0.3), 2: (1000, 10, 0.5), 3: (1200, 12, 0.7)}), seconds=2.0)
    assert rate == pytest.approx(24_400 / 1.2)
    assert startup == pytest.approx(0.8)
    assert calibration.figures_from_manifest(manifest({1: (1000, 0, 0.3)}), seconds=1.0) is None


def test_kept_figures_are_this_machines_and_a_damaged_file_means_not_measured(tmp_path, monkeypatch):
    path = tmp_path / "calibration.json"
    monkeypatch.setenv("SPLASHDRAFT_CALIBRATION", str(path))
    assert calibration.load("sph") is None
    assert calibration.save("sph", 50_000.0, 1.5, source="test") == path
    assert calibration.load("sph")["rate"] == 50_000.0 and calibration.load("learned") is None
    data = json.loads(path.read_text())
    data["machines"] = {"another machine": data["machines"][calibration.machine_key()]}
    path.write_text(json.dumps(data))
    assert calibration.load("sph") is None, "another machine's speed is not this one's"
    for damaged in ("{", json.dumps({"format": "splashdraft-calibration", "machines": {
            calibration.machine_key(): {"sph": {"rate": -1, "startup_seconds": 0}}}})):
        path.write_text(damaged)
        assert calibration.load("sph") is None


def test_a_calibration_bake_is_kept_and_used_by_the_estimate(tmp_path, monkeypatch):
    """Before: the estimate says its time is rough. After calibrating with the reference solver the
    kept rate reproduces the calibration bake's own manifest, and the estimate of another shot uses
    it: time = start-up + (frames - 1) x substeps x particles / rate."""
    monkeypatch.setenv("SPLASHDRAFT_CALIBRATION", str(tmp_path / "calibration.json"))
    shot = calibration.calibration_scene(spacing=0.05)
    before, _ = quick_estimate(shot)
    assert not before.is_measured and "rough" in before.throughput_source
    seen = {}
    original = calibration.figures_from_manifest

    def spy(manifest, seconds):
        seen["manifest"], seen["seconds"] = manifest, seconds
        return original(manifest, seconds)

    monkeypatch.setattr(calibration, "figures_from_manifest", spy)
    kept = calibration.calibrate("sph", scene=shot)
    frames = seen["manifest"]["frames"]
    work = sum(frames[k]["particles"] * frames[k]["substeps"] for k in frames if k != "1")
    assert kept["rate"] == pytest.approx(work / sum(frames[k]["seconds"] for k in frames if k != "1"))
    assert 0 <= kept["startup_seconds"] <= seen["seconds"]
    after, _ = quick_estimate(shot)
    assert after.is_measured and "measured on this computer" in after.throughput_source
    expected = kept["startup_seconds"] + (after.frames - 1) * after.substeps_per_frame * after.particles / kept["rate"]
    assert after.seconds == pytest.approx(expected)
    assert calibration.load("learned") is None


def test_record_bake_reads_a_real_cache(tmp_path, monkeypatch):
    """The add-on keeps the figures of each finished bake: from the cache's own manifest."""
    from engine.bake import bake

    monkeypatch.setenv("SPLASHDRAFT_CALIBRATION", str(tmp_path / "calibration.json"))
    result = bake(calibration.calibration_scene(spacing=0.05), "sph", tmp_path / "bake", frames=(1, 3),
                  use_signals=False)
    assert calibration.record_bake("sph", open_cache(tmp_path / "bake").manifest, result.seconds) is not None
    assert calibration.load("sph")["source"] == "bake of 'calibration_block'"
