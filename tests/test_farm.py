"""Wedges on real Dask clusters: a LocalCluster, a scheduler and workers as separate processes, a killed worker.

Oracle: a serial bake of the same variant scene in this process (``--workers 0``, the plain bake
loop). Every frame a distributed wedge writes must be byte-identical (equal PLY bytes) to it,
the property DEVELOPERS.md asks of resumed bakes. The reference solver is being changed by
others, so nothing here depends on frame contents beyond "distributed equals serial".
Dask itself is real throughout (no mocks): ``distributed.LocalCluster`` worker processes, and
``python -m dask scheduler`` / ``python -m dask worker`` started as subprocesses.
"""

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from engine.cli import main
from engine.errors import SceneError, UsageError
from engine.wedge import WEDGE_MANIFEST, parse_vary, set_scene_value, variant_progress

from tests.test_bake import write_tiny_scene

distributed = pytest.importorskip("distributed", reason="dask[distributed] is in requirements.txt; install it")

ROOT = Path(__file__).resolve().parents[1]
VARY = ["--vary", "fluid.viscosity=0.01,0.04", "--vary", "particle_spacing=0.025,0.03"]


def _variant_dirs(wedge):
    manifest = json.loads((Path(wedge) / WEDGE_MANIFEST).read_text())
    return {v["name"]: Path(v["cache"]) for v in manifest["variants"]}, manifest


def _frame_bytes(cache):
    return {p.name: p.read_bytes() for p in sorted(Path(cache).glob("points_*.ply"))}


def _assert_same_frames(wedge_a, wedge_b):
    dirs_a, _ = _variant_dirs(wedge_a)
    dirs_b, _ = _variant_dirs(wedge_b)
    assert sorted(dirs_a) == sorted(dirs_b)
    for name in dirs_a:
        frames_a, frames_b = _frame_bytes(dirs_a[name]), _frame_bytes(dirs_b[name])
        assert frames_a and frames_a.keys() == frames_b.keys(), name
        for frame in frames_a:
            assert frames_a[frame] == frames_b[frame], f"{name}/{frame} differs from the serial bake"


# --------------------------------------------------------------------------- plain parsing (no cluster)


def test_vary_parsing_and_named_errors():
    """Values parse as JSON where they can and as text otherwise; bad keys name the choices."""
    assert parse_vary("fluid.viscosity=0.01, 0.05") == ("fluid.viscosity", [0.01, 0.05])
    assert parse_vary("bounds.faces.z_max=open,wall") == ("bounds.faces.z_max", ["open", "wall"])
    with pytest.raises(UsageError, match="expected KEY=V1,V2"):
        parse_vary("fluid.viscosity")
    with pytest.raises(UsageError, match="listed twice"):
        parse_vary("fluid.viscosity=1,1")
    data = {"emitters": [{"name": "spout", "speed": 1.0}], "gravity": [0, 0, -9.81]}
    set_scene_value(data, "emitters.spout.speed", 2.5)
    set_scene_value(data, "gravity.2", -5.0)
    set_scene_value(data, "fluid.viscosity", 0.03)
    assert data == {"emitters": [{"name": "spout", "speed": 2.5}], "gravity": [0, 0, -5.0],
                    "fluid": {"viscosity": 0.03}}  # fmt: skip
    with pytest.raises(UsageError, match="'emitters.tap' names nothing in the scene; choose one of spout"):
        set_scene_value(data, "emitters.tap.speed", 1.0)


def test_wedge_bad_values_are_named_before_any_bake(tmp_path, capsys):
    scene = write_tiny_scene(tmp_path / "scene", frame_end=3)
    status = main(["wedge", str(scene), "--vary", "fluid.viscosity=0.02,7", "--out", str(tmp_path / "w"),
                   "--workers", "0"])  # fmt: skip
    err = capsys.readouterr().err
    assert status == SceneError.exit_code
    assert "wedge variant v01_viscosity-7" in err and "viscosity" in err and "Traceback" not in err
    assert not list((tmp_path / "w").glob("v0*/points_*.ply"))
    status = main(["wedge", str(scene), "--vary", "emitters.spout.speed=1,2", "--out", str(tmp_path / "w2"),
                   "--workers", "0"])  # fmt: skip
    assert status == UsageError.exit_code
    assert "choose one of block" in capsys.readouterr().err


def test_unreachable_scheduler_is_a_named_usage_error(tmp_path, capsys):
    scene = write_tiny_scene(tmp_path / "scene", frame_end=2)
    started = time.monotonic()
    status = main(["wedge", str(scene), "--vary", "fluid.viscosity=0.01", "--out", str(tmp_path / "w"),
                   "--scheduler", "tcp://127.0.0.1:9"])  # fmt: skip
    err = capsys.readouterr().err
    assert status == UsageError.exit_code
    assert "no Dask scheduler answered" in err and "dask scheduler" in err
    assert time.monotonic() - started < 60


# --------------------------------------------------------------------------- LocalCluster


def test_local_cluster_wedge_2x2_equals_serial_and_resumes(tmp_path, capsys):
    """A 2 x 2 wedge on a LocalCluster of 2 worker processes: four complete caches, a wedge manifest,
    a contact sheet, JSON summary; frames byte-identical to the serial wedge; a re-run bakes nothing;
    a wedge of other values in the same folder is refused."""
    scene = write_tiny_scene(tmp_path / "scene", frame_end=4)
    serial, farm = tmp_path / "serial", tmp_path / "farm"
    assert main(["wedge", str(scene), *VARY, "--out", str(serial), "--workers", "0", "--progress", "none"]) == 0
    capsys.readouterr()
    assert main(["wedge", str(scene), *VARY, "--out", str(farm), "--workers", "2", "--json",
                 "--progress", "json", "--sheet-frame", "3"]) == 0  # fmt: skip
    captured = capsys.readouterr()
    summary = json.loads(captured.out)
    assert len(summary["variants"]) == 4
    assert {r["state"] for r in summary["variants"]} == {"complete"}
    assert {r["frames"] for r in summary["variants"]} == {4}
    workers = {r["worker"] for r in summary["variants"]}
    assert len(workers) >= 1 and all(str(os.getpid()) != w.split(":")[-1] for w in workers)
    events = [json.loads(line) for line in captured.err.splitlines() if line.startswith("{")]
    assert events[0]["event"] == "wedge_start" and events[-1]["event"] == "wedge_finished"
    assert sum(e["event"] == "variant" and e["state"] == "complete" for e in events) == 4
    sheet = Path(summary["contact_sheet"])
    assert sheet.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    dirs, manifest = _variant_dirs(farm)
    assert manifest["format"] == "splashdraft-wedge" and len(manifest["vary"]) == 2
    settings = sorted((v["settings"]["fluid.viscosity"], v["settings"]["particle_spacing"]) for v in manifest["variants"])
    assert settings == [(0.01, 0.025), (0.01, 0.03), (0.04, 0.025), (0.04, 0.03)]
    for name, cache in dirs.items():
        baked = json.loads((cache / "scene" / "scene.json").read_text())
        assert json.loads((cache / "manifest.json").read_text())["complete"] is True
        assert baked["name"].endswith(name)
    _assert_same_frames(serial, farm)

    # Re-running the same command skips every complete variant (nothing is baked again).
    stamps = {name: (cache / "points_0004.ply").stat().st_mtime_ns for name, cache in dirs.items()}
    assert main(["wedge", str(scene), *VARY, "--out", str(farm), "--workers", "2", "--progress", "bar"]) == 0
    assert "nothing to bake" in capsys.readouterr().err
    assert stamps == {name: (cache / "points_0004.ply").stat().st_mtime_ns for name, cache in dirs.items()}

    # Another set of values into the same wedge folder is refused by name.
    status = main(["wedge", str(scene), "--vary", "fluid.viscosity=0.02", "--out", str(farm), "--workers", "0"])
    assert status == 4 and "holds a wedge with another vary" in capsys.readouterr().err
    assert not (farm / "scenes" / "v00_viscosity-0.02").exists()  # nothing written into the other wedge


def test_partial_variant_is_resumed_not_restarted(tmp_path, capsys):
    """A variant cut off after two frames (a bake of frames 1:2 in its folder) is continued from its
    checkpoint by the wedge: the report counts only the frames still missing, and every frame equals
    the serial wedge's."""
    from engine.bake import bake

    scene = write_tiny_scene(tmp_path / "scene", frame_end=5)
    vary = ["--vary", "fluid.viscosity=0.01,0.04"]
    serial, farm = tmp_path / "serial", tmp_path / "farm"
    assert main(["wedge", str(scene), *vary, "--out", str(serial), "--workers", "0", "--progress", "none"]) == 0
    # Plan the farm wedge, then cut variant 0 short by hand (as a killed bake would leave it).
    assert main(["wedge", str(scene), *vary, "--out", str(farm), "--workers", "0", "--progress", "none",
                 "--frames", "1:1"]) == 0  # fmt: skip
    capsys.readouterr()
    dirs, manifest = _variant_dirs(farm)
    first = manifest["variants"][0]
    bake(first["scene_file"], "sph", first["cache"], frames=(2, 2), use_signals=False)
    (farm / WEDGE_MANIFEST).unlink()  # a new wedge command (whole shot) over the same folders
    assert variant_progress(first["cache"])[0] == 2
    assert main(["wedge", str(scene), *vary, "--out", str(farm), "--workers", "2", "--json", "--progress", "none"]) == 0
    rows = {r["variant"]: r for r in json.loads(capsys.readouterr().out)["variants"]}
    assert rows[first["name"]]["frames"] == 5 and rows[first["name"]]["state"] == "complete"
    _assert_same_frames(serial, farm)


# --------------------------------------------------------------------------- scheduler + workers as processes


def _start(args, log):
    env = dict(os.environ, PYTHONPATH=str(ROOT), OMP_NUM_THREADS="1")
    return subprocess.Popen([sys.executable, "-m", "dask", *args], cwd=ROOT, env=env, stdout=log, stderr=log,
                            start_new_session=True)  # fmt: skip


def start_scheduler(address_file, log):
    """A ``dask scheduler`` process writing its address to ``address_file``; returns (process, address)."""
    scheduler = _start(["scheduler", "--scheduler-file", str(address_file), "--host", "127.0.0.1", "--port", "0",
                        "--no-dashboard"], log)  # fmt: skip
    deadline = time.monotonic() + 60
    while not address_file.exists() and time.monotonic() < deadline:
        time.sleep(0.2)
    assert address_file.exists(), Path(log.name).read_text()
    time.sleep(0.3)
    return scheduler, json.loads(address_file.read_text())["address"]


def stop_processes(processes):
    """SIGTERM the processes still running, last started first; kill any not gone within 20 s."""
    for process in reversed(processes):
        if process.poll() is None:
            process.send_signal(signal.SIGTERM)
    for process in processes:
        try:
            process.wait(timeout=20)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait()


@pytest.fixture
def dask_processes(tmp_path):
    """A ``dask scheduler`` and two ``dask worker`` processes (no nanny, one thread each)."""
    address_file = tmp_path / "scheduler.json"
    log = open(tmp_path / "dask.log", "w")
    scheduler, address = start_scheduler(address_file, log)
    processes = [scheduler]
    workers = [_start(["worker", address, "--nthreads", "1", "--no-nanny", "--no-dashboard", "--host", "127.0.0.1"],
                      log) for _ in range(2)]  # fmt: skip
    processes += workers
    with distributed.Client(address, timeout="30s") as client:
        client.wait_for_workers(2, timeout=60)
    yield address, workers
    stop_processes(processes)
    log.close()


def test_scheduler_address_wedge_equals_serial(tmp_path, dask_processes, capsys):
    """The same 2 x 2 wedge sent to a scheduler started by hand: bit-identical to the serial bake,
    baked by the two worker processes (their pids in the reports)."""
    address, workers = dask_processes
    scene = write_tiny_scene(tmp_path / "scene", frame_end=4)
    serial, farm = tmp_path / "serial", tmp_path / "farm"
    assert main(["wedge", str(scene), *VARY, "--out", str(serial), "--workers", "0", "--progress", "none"]) == 0
    capsys.readouterr()
    assert main(["wedge", str(scene), *VARY, "--out", str(farm), "--scheduler", address, "--json",
                 "--progress", "none"]) == 0  # fmt: skip
    rows = json.loads(capsys.readouterr().out)["variants"]
    pids = {int(r["worker"].split(":")[-1]) for r in rows}
    assert pids <= {w.pid for w in workers} and pids
    _assert_same_frames(serial, farm)


def test_killed_worker_loses_only_its_frame(tmp_path, dask_processes):
    """Two variants on two worker processes; one worker is SIGKILLed while its variant is part-baked.
    The scheduler hands the task to the surviving worker, which resumes from the checkpoint: the
    wedge finishes, every frame equals the serial bake, and the resumed variant's report counts
    fewer frames written than the shot has (it continued; it did not start again)."""
    address, workers = dask_processes
    scene = write_tiny_scene(tmp_path / "scene", frame_end=40, spacing=0.0125)
    vary = ["--vary", "fluid.viscosity=0.01,0.04"]
    serial, farm = tmp_path / "serial", tmp_path / "farm"
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    client = subprocess.Popen(
        [sys.executable, "-m", "engine", "wedge", str(scene), *vary, "--out", str(farm), "--scheduler", address,
         "--json", "--progress", "json"], cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )  # fmt: skip
    # Kill one worker once both variants have frames on disk and neither is complete.
    deadline = time.monotonic() + 120
    killed = None
    while time.monotonic() < deadline and client.poll() is None:
        caches = sorted(farm.glob("v0*/manifest.json"))
        progress = [variant_progress(p.parent) for p in caches]
        if len(progress) == 2 and all(3 <= done <= 30 and not complete for done, complete in progress):
            killed = workers[0]
            killed.send_signal(signal.SIGKILL)
            break
        time.sleep(0.05)
    out, err = client.communicate(timeout=600)
    assert killed is not None, "the bake finished before a worker could be killed mid-variant; use a longer shot"
    assert client.returncode == 0, err
    rows = {r["variant"]: r for r in json.loads(out)["variants"]}
    assert {r["state"] for r in rows.values()} == {"complete"}
    assert {r["frames"] for r in rows.values()} == {40}
    survivor = workers[1].pid
    assert {int(r["worker"].split(":")[-1]) for r in rows.values()} == {survivor}
    assert min(r["frames_written"] for r in rows.values()) < 40  # the killed variant was continued
    assert main(["wedge", str(scene), *vary, "--out", str(serial), "--workers", "0", "--progress", "none"]) == 0
    _assert_same_frames(serial, farm)
    manifest = json.loads((farm / WEDGE_MANIFEST).read_text())
    assert all(v["state"] == "complete" for v in manifest["variants"])


def test_sigterm_stops_a_dask_wedge_after_the_current_frames_and_the_rerun_finishes_it(tmp_path):
    """SIGTERM to the wedge command (the add-on's Stop) on a LocalCluster: exit 130 (cancelled), the
    variants are left partial with their finished frames, and re-running the same command finishes
    them with every frame byte-identical to the serial wedge."""
    scene = write_tiny_scene(tmp_path / "scene", frame_end=30, spacing=0.0125)
    vary = ["--vary", "fluid.viscosity=0.01,0.04"]
    serial, farm = tmp_path / "serial", tmp_path / "farm"
    command = [sys.executable, "-m", "engine", "wedge", str(scene), *vary, "--out", str(farm), "--workers", "2",
               "--progress", "json"]  # fmt: skip
    client = subprocess.Popen(command, cwd=ROOT, env=dict(os.environ, PYTHONPATH=str(ROOT)), stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True)  # fmt: skip
    deadline = time.monotonic() + 120
    stopped = False
    while time.monotonic() < deadline and client.poll() is None:
        progress = [variant_progress(p.parent) for p in farm.glob("v0*/manifest.json")]
        if len(progress) == 2 and all(2 <= done <= 20 and not complete for done, complete in progress):
            client.send_signal(signal.SIGTERM)
            stopped = True
            break
        time.sleep(0.05)
    out, err = client.communicate(timeout=300)
    assert stopped, "the wedge finished before it could be stopped; use a longer shot"
    assert client.returncode == 130, err
    manifest = json.loads((farm / WEDGE_MANIFEST).read_text())
    assert {v["state"] for v in manifest["variants"]} == {"partial"}
    assert all(0 < v["frames_done"] < 30 for v in manifest["variants"])
    assert subprocess.run(command, cwd=ROOT, env=dict(os.environ, PYTHONPATH=str(ROOT)), capture_output=True,
                          timeout=600).returncode == 0  # fmt: skip
    assert main(["wedge", str(scene), *vary, "--out", str(serial), "--workers", "0", "--progress", "none"]) == 0
    _assert_same_frames(serial, farm)
