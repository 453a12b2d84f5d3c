"""Running wedge variants: serially in this process, or as Dask tasks on a cluster.

``run_serial`` bakes the variants one after another here (``--workers 0``).
``run_on_dask`` sends one task per variant (``engine.wedge.bake_variant``) to
a ``dask.distributed`` cluster: a ``LocalCluster`` of worker processes sized
to the machine (one thread each), or an existing scheduler at ``--scheduler
tcp://HOST:PORT`` (``dask scheduler`` and ``dask worker`` started by hand, or
a studio's farm).

What travels: Dask's own task transport carries the task (the function by
reference, plus a small dict of paths and settings) and the returned report
dict. Scenes, caches and models stay on disk as plain data (JSON, PLY, npz,
ONNX): every worker reads the variant's scene file and writes its cache
folder, so ``--out`` must be on storage every worker sees at the same path.
``check_shared_storage`` proves that before any work is sent: the client
writes a token file into ``--out`` and each worker must read it back and
write one of its own; workers that cannot are named.

A worker that dies mid-bake: the scheduler hands the task to another worker
(Dask's ``allowed-failures``, 3 by default), which resumes the variant from
its last checkpoint (``engine.bake`` resume). Only the frame being computed
is lost, and the resumed frames are bit-identical (the bake is deterministic).

Progress: the client polls each variant's cache manifest (written atomically
by the bake) and reports frames per variant; ``WedgeProgress`` prints lines
or JSON events. Cancel (Ctrl-C on the client): a Dask ``Event`` that each
bake polls after every frame is set, so workers stop after their current
frame; re-running the same command resumes.
"""

import logging
import os
import time
import uuid
from pathlib import Path

from .errors import CacheError, DependencyError, UsageError
from .wedge import apply_report, bake_variant, variant_progress, write_manifest

DASK_INSTALL = "pip install -r requirements.txt (dask[distributed] is an engine dependency)"


def import_distributed():
    """The ``distributed`` module, or DependencyError naming the install command."""
    try:
        import distributed
    except ImportError as exc:
        raise DependencyError(f"wedges on Dask need dask.distributed, which is not installed ({exc}); "
                              f"run {DASK_INSTALL}, or bake serially with --workers 0") from None  # fmt: skip
    return distributed


def local_worker_count():
    """Workers for a LocalCluster: one per CPU core this process may use."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:
        return max(1, os.cpu_count() or 1)


class WedgeProgress:
    """Per-variant progress on stderr: plain lines, JSON lines, or nothing.

    JSON events (one object per line):
    ``{"event": "wedge_start", "variants": n, "to_bake": k, "workers": [...]}``,
    ``{"event": "variant", "variant": name, "state": s, "done": frames, "total": m}`` whenever a
    variant's frame count or state changes, and ``{"event": "wedge_finished", "complete": c,
    "failed": f, "seconds": x}``.
    """

    def __init__(self, kind="bar", stream=None):
        import sys

        self.kind = kind
        self.stream = stream if stream is not None else sys.stderr
        self._last = {}

    def _emit(self, text, event):
        import json

        if self.kind == "json":
            self.stream.write(json.dumps(event) + "\n")
        elif self.kind == "bar":
            self.stream.write(text + "\n")
        else:
            return
        self.stream.flush()

    def start(self, variants, to_bake, where):
        self._emit(f"wedge: {variants} variants, {to_bake} to bake, on {where}",
                   {"event": "wedge_start", "variants": variants, "to_bake": to_bake, "where": where})

    def variant(self, name, state, done, total, worker=None):
        key = (state, done)
        if self._last.get(name) == key:
            return
        self._last[name] = key
        where = f" on {worker}" if worker else ""
        self._emit(f"  {name}: {state}, {done}/{total if total is not None else '?'} frames{where}",
                   {"event": "variant", "variant": name, "state": state, "done": done, "total": total,
                    "worker": worker})  # fmt: skip

    def note(self, text):
        self._emit(f"note: {text}", {"event": "note", "message": text})

    def finished(self, complete, failed, seconds):
        self._emit(f"wedge finished: {complete} complete, {failed} not complete, {seconds:.1f} s wall time",
                   {"event": "wedge_finished", "complete": complete, "failed": failed, "seconds": round(seconds, 3)})


def _entry(manifest, name):
    return next(v for v in manifest["variants"] if v["name"] == name)


def run_serial(jobs, manifest, out_dir, frames_total, progress):
    """Bake the jobs one after another in this process (Ctrl-C stops after the current frame)."""
    from .bake import StopFlag

    stop = StopFlag().install()
    try:
        for job in jobs:
            if stop.is_set:
                break
            entry = _entry(manifest, job["name"])
            entry["state"] = "running"
            progress.variant(job["name"], "running", variant_progress(job["cache"])[0], frames_total)
            report = bake_variant(job, should_stop=lambda: stop.is_set)
            apply_report(entry, report, frames_total)
            write_manifest(out_dir, manifest)
            progress.variant(job["name"], entry["state"], entry["frames_done"], frames_total)
    finally:
        stop.restore()
    return not stop.is_set


def _probe_storage(folder, token_name, token, paths):
    """Run on each worker: can it read the client's token in ``folder``, write there, and see ``paths``?"""
    import socket

    folder = Path(folder)
    result = {"host": socket.gethostname(), "pid": os.getpid(), "reads": False, "writes": False, "missing": []}
    try:
        result["reads"] = (folder / token_name).read_text() == token
        mine = folder / f".worker-probe-{uuid.uuid4().hex}"
        mine.write_text(token)
        result["writes"] = mine.read_text() == token
        mine.unlink()
    except OSError:
        pass
    result["missing"] = [p for p in paths if not Path(p).exists()]
    return result


def check_shared_storage(client, out_dir, paths=()):
    """Raise CacheError unless every worker reads and writes ``out_dir`` and sees each of ``paths``.

    Returns:
        {worker address: probe dict} of the workers checked.
    """
    out_dir = Path(out_dir)
    token = uuid.uuid4().hex
    token_name = f".farm-probe-{token[:12]}"
    (out_dir / token_name).write_text(token)
    try:
        probes = client.run(_probe_storage, str(out_dir), token_name, token, [str(p) for p in paths])
    finally:
        (out_dir / token_name).unlink(missing_ok=True)
    blind = [f"{address} ({p['host']})" for address, p in probes.items() if not (p["reads"] and p["writes"])]
    if blind:
        raise CacheError(
            f"--out {out_dir}: workers {', '.join(blind)} cannot read and write this folder at the same path; "
            "put --out on storage every worker mounts at the same path (a shared file system), or run the "
            "wedge on a local cluster (leave out --scheduler)"
        )
    missing = {address: p["missing"] for address, p in probes.items() if p["missing"]}
    if missing:
        address, lost = next(iter(missing.items()))
        raise CacheError(
            f"worker {address} cannot see {lost[0]} (and {len(lost) - 1} more paths); the scene, its meshes and "
            "the model must be on storage every worker mounts at the same path"
        )
    return probes


def connect(scheduler=None, workers=None, timeout=30.0):
    """(client, cluster or None): a client of the scheduler at ``scheduler``, or of a new LocalCluster.

    Raises:
        UsageError: no scheduler answers at the address, or it has no workers within ``timeout`` s.
    """
    distributed = import_distributed()
    if scheduler is not None:
        try:
            client = distributed.Client(scheduler, timeout=f"{int(timeout)}s", set_as_default=False)
        except (OSError, TimeoutError, ValueError) as exc:
            raise UsageError(f"--scheduler {scheduler}: no Dask scheduler answered ({type(exc).__name__}: {exc}); "
                             "start one with `dask scheduler` and pass the address it prints") from None  # fmt: skip
        try:
            client.wait_for_workers(1, timeout=timeout)
        except (TimeoutError, OSError):
            client.close()
            raise UsageError(f"--scheduler {scheduler}: the scheduler has no workers after {timeout:g} s; "
                             f"start some with `dask worker {scheduler}`") from None  # fmt: skip
        return client, None
    count = int(workers) if workers else local_worker_count()
    # The reference solver runs its sparse products on a small thread pool (SPLASHDRAFT_THREADS); split the
    # cores between the workers so that they do not fight over them. A value the user set wins.
    threads = os.environ.get("SPLASHDRAFT_THREADS") or str(max(1, local_worker_count() // count))
    cluster = distributed.LocalCluster(
        n_workers=count, threads_per_worker=1, processes=True, dashboard_address=None,
        silence_logs=logging.ERROR, env={"SPLASHDRAFT_THREADS": threads},
    )  # fmt: skip
    client = distributed.Client(cluster, set_as_default=False)
    return client, cluster


def run_on_dask(jobs, manifest, out_dir, frames_total, progress, client, poll_seconds=0.5):
    """Bake the jobs as Dask tasks; fold reports into ``manifest`` as they arrive.

    Returns:
        True when every job came back (complete, failed or skipped); False when cancelled.
    """
    distributed = import_distributed()
    run_id = uuid.uuid4().hex[:10]
    stop = distributed.Event(f"splashdraft-stop-{run_id}", client=client)
    futures = {}
    for job in jobs:
        future = client.submit(_bake_task, job, stop.name, key=f"splashdraft-bake-{job['name']}-{run_id}",
                               pure=False)  # fmt: skip
        futures[future] = job
    pending = set(futures)
    try:
        while pending:
            for future in [f for f in pending if f.done()]:
                pending.discard(future)
                job = futures[future]
                entry = _entry(manifest, job["name"])
                if future.status == "finished":
                    report = future.result()
                else:
                    exc = future.exception()
                    report = {"name": job["name"], "state": "failed", "seconds": 0.0, "worker": None,
                              "error": f"{type(exc).__name__}: {exc}"}  # fmt: skip
                apply_report(entry, report, frames_total)
                progress.variant(job["name"], entry["state"], entry["frames_done"], frames_total, entry["worker"])
                write_manifest(out_dir, manifest)
            changed = False
            for future in pending:
                job = futures[future]
                entry = _entry(manifest, job["name"])
                done, _ = variant_progress(job["cache"])
                state = "running" if done and entry["state"] != "running" else entry["state"]
                if done != entry["frames_done"] or state != entry["state"]:
                    entry.update(frames_done=done, state=state, frames_total=frames_total)
                    progress.variant(job["name"], state, done, frames_total)
                    changed = True
            if changed:
                write_manifest(out_dir, manifest)
            if pending:
                time.sleep(poll_seconds)
    except KeyboardInterrupt:
        stop.set()
        progress.note("stopping: each running variant finishes its current frame; re-run the same command to resume")
        try:
            distributed.wait(list(pending), timeout=120, return_when="ALL_COMPLETED")
        except TimeoutError:
            progress.note("some variants did not stop within 120 s; their finished frames are kept")
        for future in pending:
            entry = _entry(manifest, futures[future]["name"])
            entry.update(state="partial", frames_done=variant_progress(entry["cache"])[0])
        write_manifest(out_dir, manifest)
        return False
    return True


def _bake_task(job, stop_event_name):
    """The Dask task: bake one variant, stopping after a frame once the wedge's stop Event is set."""
    import distributed

    event = distributed.Event(stop_event_name)
    return bake_variant(job, should_stop=event.is_set)


def run_wedge(scene_file, vary, solver_name, out_dir, frames=None, model=None, workers=None, scheduler=None,
              progress=None, sheet_frame=None):
    """Plan, bake (resuming) and summarise a wedge; returns (manifest dict, contact sheet path or None, cancelled).

    Args:
        scene_file: the base scene file.
        vary: [(key, [values])] (``engine.wedge.parse_vary``).
        solver_name: "sph" or "learned"; model: a model folder or file for the learned preview (or None).
        out_dir: the wedge folder.
        frames: None or "A:B" / (a, b), passed to each variant's bake.
        workers: 0 bakes serially here; None or N > 0 starts a LocalCluster of N worker processes
            (None: one per CPU core); ignored with ``scheduler``.
        scheduler: address of an existing Dask scheduler (tcp://HOST:PORT).
        progress: WedgeProgress (default: lines on stderr).
        sheet_frame: the frame for the contact sheet (default: the last frame of the range).
    """
    from .bake import load_scene_any, resolve_frames
    from .solvers import make_solver
    from .wedge import SHEET_NAME, check_same_wedge, new_manifest, plan_variants, write_contact_sheet

    started = time.monotonic()
    progress = progress or WedgeProgress()
    out_dir = Path(out_dir).resolve()
    if workers is not None and int(workers) < 0:
        raise UsageError(f"--workers {workers}: give 0 (bake here, one variant after another) or a positive count")
    scene = load_scene_any(scene_file)
    first, last = resolve_frames(scene, frames)
    frames = None if frames is None else [first, last]
    model_path = None
    if model is not None:
        make_solver(solver_name, model=model)  # the contract check, here before anything is sent
        from .learned.contract import find_model

        model_path = str(find_model(model).resolve())
    if sheet_frame is not None and not first <= int(sheet_frame) <= last:
        raise UsageError(f"--sheet-frame {sheet_frame}: outside the wedge's frames {first}..{last}; pick one inside")
    out_dir.mkdir(parents=True, exist_ok=True)
    # Refuse another wedge's folder before writing anything into it.
    old = check_same_wedge(out_dir, new_manifest(scene_file, solver_name, model_path, frames, vary, []))
    plan = plan_variants(scene_file, vary, out_dir, solver_name)
    manifest = new_manifest(scene_file, solver_name, model_path, frames, vary, plan)
    if old is not None:
        manifest["created"] = old.get("created", manifest["created"])
    frames_total = last - scene.frame_start + 1
    jobs = []
    for variant, entry in zip(plan, manifest["variants"]):
        from .wedge import is_variant_complete

        done, _ = variant_progress(variant["cache"])
        entry.update(frames_done=done, frames_total=frames_total)
        if old is not None:
            previous = next((v for v in old.get("variants", []) if v.get("name") == variant["name"]), None)
            if previous is not None:
                entry.update(seconds=previous.get("seconds"), worker=previous.get("worker"),
                             particles=previous.get("particles", 0))  # fmt: skip
        if is_variant_complete(variant["cache"], first, last):
            entry["state"] = "complete"
            continue
        entry["state"] = "partial" if done else "pending"
        jobs.append({"name": variant["name"], "scene_file": variant["scene_file"], "cache": variant["cache"],
                     "solver": solver_name, "frames": frames, "model": model_path})  # fmt: skip
    write_manifest(out_dir, manifest)
    finished = True
    if jobs and (workers == 0 and scheduler is None):
        progress.start(len(plan), len(jobs), "this process (serial)")
        finished = run_serial(jobs, manifest, out_dir, frames_total, progress)
    elif jobs:
        client, cluster = connect(scheduler, workers if workers else min(len(jobs), local_worker_count()))
        try:
            paths = [scene_file] + ([model_path] if model_path else [])
            check_shared_storage(client, out_dir, [str(Path(p).resolve()) for p in paths])
            where = scheduler or f"a local Dask cluster of {len(client.scheduler_info()['workers'])} workers"
            progress.start(len(plan), len(jobs), where)
            finished = run_on_dask(jobs, manifest, out_dir, frames_total, progress, client)
        finally:
            client.close()
            if cluster is not None:
                cluster.close()
    else:
        progress.start(len(plan), 0, "nothing to bake: every variant is complete")
    sheet = None
    frame = last if sheet_frame is None else int(sheet_frame)
    if any(v["frames_done"] for v in manifest["variants"]):
        sheet = write_contact_sheet(manifest, frame, out_dir / SHEET_NAME)
    write_manifest(out_dir, manifest)
    complete = sum(v["state"] == "complete" for v in manifest["variants"])
    progress.finished(complete, len(plan) - complete, time.monotonic() - started)
    return manifest, sheet, not finished
