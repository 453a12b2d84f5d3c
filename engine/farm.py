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

Speed (measured; DEVELOPERS.md "Wedges and farm bakes"): every task first calls
``keep_freed_memory`` (Dask starts workers with a malloc setting that made a bake
spend 40 % more CPU in page faults), and a LocalCluster's workers run without Dask's
statistical profiler and with every library's thread pool sized to cores / workers.

``run_jobs`` is the same path for other per-shot work (``training.generate`` and
``bench/eval_learned.py`` with ``--workers``/``--scheduler``).

A worker that dies mid-bake: the scheduler hands the task to another worker
(Dask's ``allowed-failures``, 3 by default), which resumes the variant from
its last checkpoint (``engine.bake`` resume). Only the frame being computed
is lost, and the resumed frames are bit-identical (the bake is deterministic).

Progress: the client polls each variant's cache manifest (written atomically
by the bake) and reports frames per variant; ``WedgeProgress`` prints lines
or JSON events. Cancel (Ctrl-C or SIGTERM on the client): a Dask ``Event`` that each
bake polls after every frame is set, so workers stop after their current
frame; re-running the same command resumes.
"""

import ctypes
import ctypes.util
import logging
import os
import threading
import time
import uuid
from pathlib import Path
from types import ModuleType

from .errors import CacheError, DependencyError, SplashdraftError, UsageError
from .wedge import apply_report, bake_variant, variant_progress, write_manifest

DASK_INSTALL = "pip install -r requirements.txt (dask[distributed] is an engine dependency)"


def add_where_options(parser, workers_help, scheduler_help) -> None:
    """Add the two exclusive ways of choosing where jobs run: ``--workers N`` (a local Dask cluster of N
    worker processes) or ``--scheduler ADDRESS`` (an existing Dask scheduler); both default to None."""
    where = parser.add_mutually_exclusive_group()
    where.add_argument("--workers", type=int, default=None, metavar="N", help=workers_help)
    where.add_argument("--scheduler", default=None, metavar="ADDRESS", help=scheduler_help)


def import_distributed() -> ModuleType:
    """The ``distributed`` module, or DependencyError naming the install command."""
    try:
        import distributed
    except ImportError as exc:
        raise DependencyError(f"wedges on Dask need dask.distributed, which is not installed ({exc}); "
                              f"run {DASK_INSTALL}, or bake serially with --workers 0") from None  # fmt: skip
    return distributed


def local_worker_count() -> int:
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

    def start(self, variants, to_bake, where) -> None:
        self._emit(f"wedge: {variants} variants, {to_bake} to bake, on {where}",
                   {"event": "wedge_start", "variants": variants, "to_bake": to_bake, "where": where})

    def variant(self, name, state, done, total, worker=None) -> None:
        key = (state, done)
        if self._last.get(name) == key:
            return
        self._last[name] = key
        where = f" on {worker}" if worker else ""
        self._emit(f"  {name}: {state}, {done}/{total if total is not None else '?'} frames{where}",
                   {"event": "variant", "variant": name, "state": state, "done": done, "total": total,
                    "worker": worker})  # fmt: skip

    def note(self, text) -> None:
        self._emit(f"note: {text}", {"event": "note", "message": text})

    def finished(self, complete, failed, seconds) -> None:
        self._emit(f"wedge finished: {complete} complete, {failed} not complete, {seconds:.1f} s wall time",
                   {"event": "wedge_finished", "complete": complete, "failed": failed, "seconds": round(seconds, 3)})


def _entry(manifest, name):
    return next(v for v in manifest["variants"] if v["name"] == name)


def run_serial(jobs, manifest, out_dir, frames_total, progress) -> bool:
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


def check_shared_storage(client, out_dir, paths=()) -> dict:
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


#: Environment variables that size the thread pools of the libraries a bake uses.
THREAD_VARIABLES = ("SPLASHDRAFT_THREADS", "OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")


def worker_threads(count) -> int:
    """Threads each of ``count`` worker processes on this machine may use (SPLASHDRAFT_THREADS wins)."""
    text = os.environ.get("SPLASHDRAFT_THREADS", "").strip()
    return max(1, int(text)) if text.isdigit() else max(1, local_worker_count() // max(1, int(count)))


def worker_environment(threads) -> dict:
    """The environment of a local worker process: every library's thread pool sized to ``threads``.

    Two worker processes on two cores, each with numpy's BLAS, the solver's sparse products and
    onnxruntime running their default pools (one thread per core each), would put several runnable
    threads on every core; one pool size for all keeps each worker on its share of the cores.
    """
    return {name: str(threads) for name in THREAD_VARIABLES}


def connect(scheduler=None, workers=None, timeout=30.0) -> tuple:
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
    if workers is not None and int(workers) < 0:
        raise UsageError(f"--workers {workers}: give a positive count of local worker processes")
    count = int(workers) if workers else local_worker_count()
    threads = worker_threads(count)
    # Measured (bench/bench_wedge.py, DEVELOPERS.md "Wedges and farm bakes"): Dask's statistical profiler
    # samples every worker thread's stack every 10 ms under the GIL, which the pure-Python solver loop
    # pays for; the bake reports its own progress, so the profiler is off in our workers. Thread-pool
    # sizes must be in the environment before a worker imports numpy: Dask's pre-spawn environment.
    import dask.config as config

    environment = dict(config.get("distributed.nanny.pre-spawn-environ"), **worker_environment(threads))
    saved = {name: os.environ.get(name) for name in environment}
    try:
        with config.set({"distributed.worker.profile.enabled": False,
                         "distributed.nanny.pre-spawn-environ": environment}):  # fmt: skip
            cluster = distributed.LocalCluster(
                n_workers=count, threads_per_worker=1, processes=True, dashboard_address=None,
                silence_logs=logging.ERROR,
            )  # fmt: skip
    finally:
        # Dask writes the pre-spawn environment into this process's own; put back what was here.
        for name, value in saved.items():
            if value is None:
                os.environ.pop(name, None)
            else:
                os.environ[name] = value
    client = distributed.Client(cluster, set_as_default=False)
    return client, cluster


def collect(futures, on_done, on_poll=None, poll_seconds=0.5) -> None:
    """Call ``on_done(job, future)`` here as each future finishes, ``on_poll(pending)`` in between.

    Args:
        futures: {future: job}.
        on_done: called once per finished future (result or error), in this process.
        on_poll: called with the {future: job} still pending, at most every ``poll_seconds``.

    A KeyboardInterrupt propagates to the caller, which decides how to stop the rest.
    """
    pending = dict(futures)
    finished_one = threading.Event()
    for future in futures:
        future.add_done_callback(lambda _: finished_one.set())
    while pending:
        finished_one.clear()
        for future in [f for f in pending if f.done()]:
            on_done(pending.pop(future), future)
        if pending and on_poll is not None:
            on_poll(pending)
        if pending:
            # Woken as soon as a task finishes, not at the next poll (the last result ends the run).
            finished_one.wait(poll_seconds)


def wait_until_done(futures, seconds, poll_seconds=0.5) -> bool:
    """Wait up to ``seconds`` for every future to finish; True when they all did."""
    deadline = time.monotonic() + seconds
    while not all(future.done() for future in futures) and time.monotonic() < deadline:
        time.sleep(poll_seconds)
    return all(future.done() for future in futures)


def task_error(future) -> str:
    """'ErrorType: message' of a failed (or lost) task."""
    exc = future.exception()
    return f"{type(exc).__name__}: {exc}"


def run_on_dask(jobs, manifest, out_dir, frames_total, progress, client, poll_seconds=0.5) -> bool:
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

    def on_done(job, future) -> None:
        entry = _entry(manifest, job["name"])
        if future.status == "finished":
            report = future.result()
        else:
            report = {"name": job["name"], "state": "failed", "seconds": 0.0, "worker": None,
                      "error": task_error(future)}  # fmt: skip
        apply_report(entry, report, frames_total)
        progress.variant(job["name"], entry["state"], entry["frames_done"], frames_total, entry["worker"])
        write_manifest(out_dir, manifest)

    def on_poll(pending) -> None:
        if stop_flag.is_set:  # SIGTERM (e.g. the add-on's Stop) or a first Ctrl-C: stop as Ctrl-C does
            raise KeyboardInterrupt
        changed = False
        for job in pending.values():
            entry = _entry(manifest, job["name"])
            done, _ = variant_progress(job["cache"])
            state = "running" if done and entry["state"] != "running" else entry["state"]
            if done != entry["frames_done"] or state != entry["state"]:
                entry.update(frames_done=done, state=state, frames_total=frames_total)
                progress.variant(job["name"], state, done, frames_total)
                changed = True
        if changed:
            write_manifest(out_dir, manifest)

    from .bake import StopFlag

    stop_flag = StopFlag().install()
    try:
        collect(futures, on_done, on_poll, poll_seconds)
    except KeyboardInterrupt:
        stop.set()
        progress.note("stopping: each running variant finishes its current frame; re-run the same command to resume")
        pending = [future for future in futures if not future.done()]
        if not wait_until_done(pending, 120, poll_seconds):
            progress.note("some variants did not stop within 120 s; their finished frames are kept")
        for future in pending:
            entry = _entry(manifest, futures[future]["name"])
            entry.update(state="partial", frames_done=variant_progress(entry["cache"])[0])
        write_manifest(out_dir, manifest)
        return False
    finally:
        stop_flag.restore()
    return True


def run_jobs(function, jobs, out_dir, scheduler=None, workers=None, paths=(), on_done=None, log=None) -> list:
    """Run ``function(job)`` for every job on Dask (a LocalCluster, or the scheduler at ``scheduler``).

    The path shared by ``training.generate --scheduler`` and ``bench/eval_learned.py --scheduler``:
    ``function`` must be importable by the workers (a module-level function of the repository, which
    must be on their PYTHONPATH), each job a small dict of paths and settings, and each result a small
    dict; the files themselves stay on storage every worker sees.

    Args:
        function: called as ``function(job)`` on a worker.
        jobs: list of dicts; ``job["name"]`` names the task in messages.
        out_dir: the folder the tasks write into (checked for every worker before anything runs).
        scheduler, workers: as for ``connect`` (workers None: one per core, at most one per job).
        paths: further files or folders every worker must see (inputs, models).
        on_done: ``on_done(job, result)`` here as each task finishes (e.g. rewrite a manifest).
        log: ``log(text)`` for one line per finished task (or None).

    Returns:
        [result] in the order of ``jobs``.

    Raises:
        UsageError: no scheduler at the address, or no workers.
        CacheError: a worker cannot read and write ``out_dir`` or cannot see one of ``paths``.
        SplashdraftError: the first task that failed, re-raised once every other task has finished
            (their results were passed to ``on_done`` first, so no finished work is lost).
    """
    if not jobs:
        return []
    out_dir = Path(out_dir).resolve()
    out_dir.mkdir(parents=True, exist_ok=True)
    client, cluster = connect(scheduler, workers if workers else min(len(jobs), local_worker_count()))
    results, errors = {}, []
    try:
        check_shared_storage(client, out_dir, [str(Path(p).resolve()) for p in paths])
        run_id = uuid.uuid4().hex[:10]
        futures = {client.submit(_run_task, function, job, key=f"splashdraft-{job['name']}-{run_id}", pure=False): index
                   for index, job in enumerate(jobs)}  # fmt: skip

        def done(index, future) -> None:
            job = jobs[index]
            if future.status != "finished":
                errors.append((job, future))
                if log is not None:
                    log(f"{job['name']}: failed on a worker ({task_error(future)})")
                return
            results[index] = future.result()
            if on_done is not None:
                on_done(job, results[index])

        collect(futures, done)
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
    if errors:
        job, future = errors[0]
        exc = future.exception()
        if isinstance(exc, SplashdraftError):
            raise exc
        raise SplashdraftError(f"{job['name']}: the task failed on a Dask worker ({task_error(future)}); "
                         "finished results are kept, re-run the same command to retry the rest") from None  # fmt: skip
    return [results[index] for index in range(len(jobs))]


#: glibc's mallopt parameter numbers (malloc.h).
M_TRIM_THRESHOLD, M_MMAP_THRESHOLD = -1, -3


def keep_freed_memory() -> bool:
    """In a Dask worker: let glibc keep freed memory for reuse; True when it was set.

    Dask's nanny starts workers with MALLOC_TRIM_THRESHOLD_=65536, which also switches off glibc's
    adaptive mmap threshold: every array over 128 KiB is then a fresh mmap whose pages the kernel
    must fault in and zero, and the solver allocates many per substep. Measured on an 8-frame,
    2.5k-particle bake: 384k minor page faults and 0.7 s system time against 17k and 0.06 s
    (+40 % CPU). Arrays up to 32 MiB from the heap and trimming only above 256 MiB restore the
    plain process's behaviour (6.6k faults, 0.03 s). Not glibc (macOS, musl): nothing to do.
    """
    try:
        mallopt = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6").mallopt
    except (OSError, AttributeError):
        return False
    return bool(mallopt(M_MMAP_THRESHOLD, 32 << 20)) and bool(mallopt(M_TRIM_THRESHOLD, 256 << 20))


def _bake_task(job, stop_event_name):
    """The Dask task: bake one variant, stopping after a frame once the wedge's stop Event is set."""
    import distributed

    keep_freed_memory()
    event = distributed.Event(stop_event_name)
    return bake_variant(job, should_stop=event.is_set)


def _run_task(function, job):
    """The Dask task of ``run_jobs``: ``function(job)`` in a worker set up as for a bake."""
    keep_freed_memory()
    return function(job)


def run_wedge(scene_file, vary, solver_name, out_dir, frames=None, model=None, workers=None, scheduler=None,
              progress=None, sheet_frame=None) -> tuple[dict, Path | None, bool]:
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
