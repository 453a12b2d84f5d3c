"""engine.calibration: this computer's bake speed, measured, kept per machine, used by the estimate.

Oracles: the time model's arithmetic on a manifest written here (rate = sum of particles x steps
over the frames after the first, divided by their seconds; start-up = wall time less those
seconds), a straight line through two points, and real bakes of the calibration shot through
engine.bake, whose manifests the kept figures must reproduce. How close the estimate comes to real bake times is a benchmark
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


def test_two_sizes_give_the_line_through_them():
    """Per-frame seconds 0.05 + work / 50,000 at 1,000 and 5,000 particle-steps: rate 50,000 and
    overhead 0.05 s exactly (a straight line through two points). A larger bake that took no
    longer (a noisy machine) falls back to no overhead and the larger bake's own rate."""
    rate, overhead = calibration.fit_two_sizes((1_000, 0.05 + 1_000 / 50_000), (5_000, 0.05 + 5_000 / 50_000))
    assert rate == pytest.approx(50_000) and overhead == pytest.approx(0.05)
    assert calibration.fit_two_sizes((1_000, 0.2), (5_000, 0.15)) == (pytest.approx(5_000 / 0.15), 0.0)


def test_a_calibration_bake_is_kept_and_used_by_the_estimate(tmp_path, monkeypatch):
    """Before: the estimate says its time is rough. After calibrating with the reference solver
    (two small bakes of the calibration shot), the kept figures are the line through the two
    bakes' own per-frame figures (read from their manifests), and the estimate of a shot uses
    them: time = start-up + (frames - 1) x (overhead + substeps x particles / rate)."""
    monkeypatch.setenv("SPLASHDRAFT_CALIBRATION", str(tmp_path / "calibration.json"))
    shots = (calibration.calibration_scene(spacing=0.06), calibration.calibration_scene(spacing=0.04))
    before, _ = quick_estimate(shots[1])
    assert not before.is_measured and "rough" in before.throughput_source
    seen = []
    original = calibration.frame_figures

    def spy(manifest, seconds):
        seen.append(original(manifest, seconds))
        return seen[-1]

    monkeypatch.setattr(calibration, "frame_figures", spy)
    kept = calibration.calibrate("sph", scenes=shots)
    (n_a, work_a, spent_a, _), (n_b, work_b, spent_b, startup_b) = seen
    rate, overhead = calibration.fit_two_sizes((work_a / n_a, spent_a / n_a), (work_b / n_b, spent_b / n_b))
    assert kept["rate"] == pytest.approx(rate) and kept["overhead_seconds"] == pytest.approx(overhead)
    assert kept["startup_seconds"] == pytest.approx(startup_b)
    after, _ = quick_estimate(shots[1])
    assert after.is_measured and "measured on this computer" in after.throughput_source
    per_frame = kept["overhead_seconds"] + after.substeps_per_frame * after.particles / kept["rate"]
    assert after.seconds == pytest.approx(kept["startup_seconds"] + (after.frames - 1) * per_frame)
    assert calibration.load("learned") is None


def test_record_bake_reads_a_real_cache(tmp_path, monkeypatch):
    """The add-on keeps the figures of each finished bake: from the cache's own manifest."""
    from engine.bake import bake

    monkeypatch.setenv("SPLASHDRAFT_CALIBRATION", str(tmp_path / "calibration.json"))
    result = bake(calibration.calibration_scene(spacing=0.05), "sph", tmp_path / "bake", frames=(1, 3),
                  use_signals=False)
    manifest = open_cache(tmp_path / "bake").manifest
    assert calibration.record_bake("sph", manifest, result.seconds) is not None
    kept = calibration.load("sph")
    assert kept["source"] == "bake of 'calibration_block'" and kept["overhead_seconds"] == 0.0
    # With a per-frame overhead kept from a calibration, a bake refits only the rate.
    calibration.save("sph", 1.0, 0.0, source="test", overhead_seconds=0.001)
    calibration.record_bake("sph", manifest, result.seconds)
    count, work, spent, _ = calibration.frame_figures(manifest, result.seconds)
    assert calibration.load("sph")["rate"] == pytest.approx(work / (spent - count * 0.001))
    assert calibration.load("sph")["overhead_seconds"] == 0.001
