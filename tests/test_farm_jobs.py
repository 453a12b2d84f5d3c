"""Training-data generation and held-out evaluation on real Dask clusters (``engine.farm.run_jobs``).

Oracle: the same command run here, one shot after another (no Dask). The reference solver is
deterministic, so every frame a Dask worker bakes must be byte-identical (equal PLY bytes) to the
serial bake, the property DEVELOPERS.md asks of resumed bakes; the evaluation rows (Chamfer
distances of the learned preview against those references) must equal the serial rows to 1e-9
relative (the same arithmetic on the same files; the tolerance only allows for onnxruntime's
thread count, which differs between a worker and this process). Dask is real throughout (no
mocks): ``distributed.LocalCluster`` worker processes, and ``python -m dask scheduler`` /
``python -m dask worker`` started as subprocesses, one of them in a private mount namespace
(``unshare -m``) where the output folder is hidden under an empty tmpfs, as on a farm node that
does not mount the studio's storage.
"""

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from engine.errors import CacheError

from tests.test_farm import _frame_bytes, dask_processes, start_scheduler, stop_processes  # noqa: F401 (a fixture)

distributed = pytest.importorskip("distributed", reason="dask[distributed] is in requirements.txt; install it")

ROOT = Path(__file__).resolve().parents[1]
#: Two steps (frames 1..3) at the training shots' 40 fps: enough to prove the frames match, short enough for a test.
DURATION = 0.05


def _shots(folder):
    manifest = json.loads((Path(folder) / "data_manifest.json").read_text())
    return {s["name"]: s for s in manifest["shots"]}, manifest


def _assert_same_shots(serial, farm):
    shots_serial, manifest_serial = _shots(serial)
    shots_farm, manifest_farm = _shots(farm)
    assert sorted(shots_serial) == sorted(shots_farm)
    for name in shots_serial:
        a, b = shots_serial[name], shots_farm[name]
        assert {k: v for k, v in a.items() if k != "bake_seconds"} == {k: v for k, v in b.items() if k != "bake_seconds"}
        frames_a, frames_b = _frame_bytes(Path(serial) / a["cache"]), _frame_bytes(Path(farm) / b["cache"])
        assert frames_a and frames_a == frames_b, f"{name}: frames differ from the serial bake"
    assert manifest_serial["fps"] == manifest_farm["fps"] and manifest_farm["kind"] == manifest_serial["kind"]


@pytest.fixture(scope="module")
def serial_training(tmp_path_factory):
    from training.generate import generate

    out = tmp_path_factory.mktemp("gen") / "serial"
    generate(out, count=2, duration=DURATION, log=lambda m: None)
    return out


def test_generate_on_a_local_cluster_equals_serial_and_resumes(serial_training, tmp_path, capsys):
    """``training.generate --workers 2``: two shots on a LocalCluster of two worker processes, the same
    manifest entries and frames as the serial run; a second run skips both shots."""
    from training.generate import main

    farm = tmp_path / "farm"
    args = ["--out", str(farm), "--count", "2", "--duration", str(DURATION), "--workers", "2"]
    assert main(args) == 0
    err = capsys.readouterr().err
    assert "shot_0000: 3 frames" in err and "shot_0001: 3 frames" in err  # frames 1..3 at 40 fps
    _assert_same_shots(serial_training, farm)
    stamps = {p: p.stat().st_mtime_ns for p in farm.glob("shot_*/cache/points_*.ply")}
    assert main(args) == 0
    assert capsys.readouterr().err.count("complete, skipped") == 2
    assert stamps == {p: p.stat().st_mtime_ns for p in farm.glob("shot_*/cache/points_*.ply")}


def test_generate_through_a_scheduler_address_equals_serial(serial_training, dask_processes, tmp_path, capsys):
    """``training.generate --scheduler ADDRESS`` with a scheduler and two workers started by hand."""
    from training.generate import main

    address, _ = dask_processes
    farm = tmp_path / "farm"
    assert main(["--out", str(farm), "--count", "2", "--duration", str(DURATION), "--scheduler", address]) == 0
    _assert_same_shots(serial_training, farm)


def test_negative_workers_is_a_usage_error(tmp_path, capsys):
    from training.generate import main

    assert main(["--out", str(tmp_path / "x"), "--count", "1", "--workers", "-1"]) == 64
    assert "--workers -1" in capsys.readouterr().err


@pytest.fixture
def blind_worker(tmp_path):
    """A scheduler and one worker that cannot see ``tmp_path``: the worker runs in its own mount
    namespace with an empty tmpfs mounted over that folder (``unshare -m``, root only)."""
    if shutil.which("unshare") is None:
        pytest.skip("unshare (util-linux) is not installed")
    probe = subprocess.run(["unshare", "-m", "sh", "-c", f"mount -t tmpfs tmpfs {tmp_path}"], capture_output=True)
    if probe.returncode != 0:
        pytest.skip(f"cannot make a private mount namespace here: {probe.stderr.decode().strip()}")
    address_file = tmp_path.parent / f"{tmp_path.name}-scheduler.json"
    log = open(tmp_path.parent / f"{tmp_path.name}-dask.log", "w")
    scheduler, address = start_scheduler(address_file, log)
    worker_command = (f"mount -t tmpfs tmpfs {tmp_path} && exec {sys.executable} -m dask worker {address} "
                      "--nthreads 1 --no-nanny --no-dashboard --host 127.0.0.1")  # fmt: skip
    worker = subprocess.Popen(["unshare", "-m", "sh", "-c", worker_command], cwd=ROOT, stdout=log, stderr=log,
                              env=dict(os.environ, PYTHONPATH=str(ROOT)), start_new_session=True)  # fmt: skip
    with distributed.Client(address, timeout="30s") as client:
        client.wait_for_workers(1, timeout=60)
    yield address
    stop_processes([scheduler, worker])
    log.close()


def test_output_folder_hidden_from_a_worker_is_a_named_error(blind_worker, tmp_path, capsys):
    """A worker that does not see --out: the command stops before baking anything, with a CacheError
    (exit 4) that names the folder and the fix; nothing is written into --out but the manifest."""
    from training.generate import main

    out = tmp_path / "data"
    status = main(["--out", str(out), "--count", "1", "--duration", str(DURATION), "--scheduler", blind_worker])
    err = capsys.readouterr().err
    assert status == CacheError.exit_code
    assert f"--out {out}" in err and "cannot read and write this folder" in err and "shared file system" in err
    assert "Traceback" not in err
    assert not list(out.glob("shot_*"))


def test_heldout_evaluation_on_workers_equals_serial(tmp_path, capsys):
    """``bench/eval_learned.py --workers 2`` against the serial run of the same evaluation: the same
    rows (Chamfer, density, penetration) for two held-out shots whose references were generated
    with ``training.generate --heldout --workers 2``."""
    from bench.eval_learned import main as evaluate
    from training.generate import generate

    heldout = tmp_path / "heldout"
    generate(heldout, heldout=True, duration=DURATION, log=lambda m: None, workers=2)
    _, manifest = _shots(heldout)
    assert [s["name"] for s in manifest["shots"]] == ["heldout_paddle", "heldout_ring", "heldout_stairs"]
    common = ["--heldout", str(heldout), "--seconds", str(DURATION), "--fidelity-seconds", str(DURATION),
              "--demo-preset", "none", "--splash-shots", "--viscosity-shots", "--shots", "ring", "stairs"]  # fmt: skip
    assert evaluate(common + ["--out", str(tmp_path / "serial")]) == 0
    assert evaluate(common + ["--out", str(tmp_path / "farm"), "--workers", "2"]) == 0
    capsys.readouterr()
    serial = json.loads((tmp_path / "serial" / "eval_learned.json").read_text())["rows"]
    farm = json.loads((tmp_path / "farm" / "eval_learned.json").read_text())["rows"]
    assert [r["shot"] for r in farm] == [r["shot"] for r in serial] == ["heldout_ring", "heldout_stairs"]
    for a, b in zip(serial, farm):
        assert a.get("compare_error") is None and b.get("compare_error") is None
        assert b["frames_compared"] == a["frames_compared"] >= 2
        for key in ("mean_chamfer_spacings", "max_chamfer_spacings", "density_within_3pct_fraction"):
            assert b[key] == pytest.approx(a[key], rel=1e-9), key
        assert b["penetrating_particles"] == a["penetrating_particles"]
