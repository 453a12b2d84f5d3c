"""Bake worker process: command line, JSON-line progress, cancel (no bpy here).

The add-on never simulates inside Blender. It starts the engine's command line
(``python -m engine bake ... --progress json``) in a child process of Blender's
own Python and reads one JSON object per line from the child's stderr (the
events are listed in DEVELOPERS.md, "Progress events"). A reader thread only
moves lines into a queue; everything that touches bpy runs on Blender's main
thread, which drains the queue from a timer (modal operator) or a plain loop
(background / scripts). Keeping this module free of bpy lets it be tested
with ordinary unit tests.
"""

import json
import os
import queue
import signal
import subprocess
import threading
import time
from dataclasses import dataclass, field

from ..engine.estimate import format_bytes
from ..engine.progress import format_duration

#: Seconds a cancelled worker gets to finish its current frame before a second cancel kills it.
CANCEL_GRACE_SECONDS = 120.0


def boot_code(extension_root, wheel_site=None) -> str:
    """Python source for ``-c``: put the engine and the bundled wheels on sys.path, run the CLI.

    This is the project's one import-path bootstrap. Blender calls its Python with ``-I``
    (isolated: PYTHONPATH and user site ignored), so the child sets ``sys.path`` itself. The
    worker is a process of its own, outside Blender: it imports the engine as ``engine``, the
    name the installed engine has everywhere outside Blender, and the processes it starts (the
    Dask workers of a wedge, which receive its ``sys.path``) find the same name. Inside
    Blender's process the engine is only ever ``<extension package>.engine`` (the add-on, and
    the tools and tests that drive it, import it through the add-on's package).

    Args:
        extension_root: folder that holds ``engine/`` (the extension root).
        wheel_site: Blender's extension site-packages with scipy/onnxruntime, or None.
    """
    paths = [str(extension_root)]
    if wheel_site:
        paths.append(str(wheel_site))
    return (
        "import sys; sys.path[:0] = %r; "
        "from engine.cli import main; sys.exit(main(sys.argv[1:]))" % (paths,)
    )


def bake_command(python, python_args, extension_root, scene_path, out_dir, solver="sph",
                 wheel_site=None, extra=()) -> list[str]:
    """argv of the bake worker.

    Args:
        python: the interpreter (``sys.executable`` inside Blender).
        python_args: ``bpy.app.python_args`` (e.g. ``('-I',)``).
        extension_root, wheel_site: see ``boot_code``.
        scene_path: the exported scene JSON. out_dir: the cache version folder.
        solver: ``"sph"`` or ``"learned"``.
        extra: further CLI arguments (e.g. ``("--frames", "1:4")``).
    """
    return [
        str(python), *python_args, "-c", boot_code(extension_root, wheel_site),
        "bake", str(scene_path), "--solver", solver, "--out", str(out_dir), "--progress", "json",
        *extra,
    ]


def estimate_command(python, python_args, extension_root, scene_path, wheel_site=None, solver="sph") -> list[str]:
    """argv of ``python -m engine estimate SCENE --json`` through the same boot code."""
    return [str(python), *python_args, "-c", boot_code(extension_root, wheel_site),
            "estimate", str(scene_path), "--solver", solver, "--json"]


def parse_event(line) -> dict | None:
    """One progress line -> event dict, or None for a line that is not a progress event.

    Non-JSON lines (warnings, a traceback of a crash) are returned as None and
    kept by the caller for the error report.
    """
    line = line.strip()
    if not line.startswith("{"):
        return None
    try:
        event = json.loads(line)
    except json.JSONDecodeError:
        return None
    if not isinstance(event, dict) or not isinstance(event.get("event"), str):
        return None
    return event


@dataclass
class BakeProgress:
    """What the panel and status bar show about one bake; updated by ``apply_event``.

    Attributes:
        state: "starting" | "running" | "cancelling" | "finished" | "cancelled" | "failed".
        first_frame, last_frame: the frame range being baked.
        done, total: frames finished / to do. frame: the last finished frame.
        particles: particle count of the last finished frame.
        eta: seconds left as the engine estimates it (None before the first frame).
        seconds: the bake's wall time as the engine reports it when finished.
        message: the error message, or the summary once finished.
        other_lines: non-event stderr lines (the tail of a crash), newest last.
    """

    state: str = "starting"
    first_frame: int = 0
    last_frame: int = 0
    done: int = 0
    total: int = 0
    frame: int = None
    particles: int = 0
    eta: float = None
    seconds: float = None
    message: str = ""
    other_lines: list = field(default_factory=list)

    @property
    def fraction(self) -> float:
        """Share of frames finished, 0..1."""
        return self.done / self.total if self.total else 0.0

    @property
    def is_over(self) -> bool:
        return self.state in ("finished", "cancelled", "failed")

    def status_text(self, shot="") -> str:
        """One line for the status bar."""
        head = f"Splashdraft {shot}: " if shot else "Splashdraft: "
        if self.state == "starting":
            return head + "starting the bake worker"
        if self.state in ("running", "cancelling"):
            eta = f", about {format_duration(self.eta)} left" if self.eta is not None else ""
            tail = " (stopping after this frame)" if self.state == "cancelling" else ""
            return head + f"frame {self.frame if self.frame is not None else '-'} ({self.done}/{self.total}), " \
                f"{plural(self.particles, 'particle')}{eta}{tail}"
        return head + self.message


def plural(count, word) -> str:
    """'1 particle', '2 particles', '1,210 particles' (English plural by -s)."""
    return f"{count:,} {word}" if count == 1 else f"{count:,} {word}s"


_MAX_OTHER_LINES = 40


def apply_event(progress, event) -> BakeProgress:
    """Update ``progress`` (in place) from one parsed event or a raw non-event line (str).

    Returns ``progress``.
    """
    if isinstance(event, str):
        if event.strip():
            progress.other_lines.append(event.rstrip())
            del progress.other_lines[:-_MAX_OTHER_LINES]
        return progress
    kind = event.get("event")
    if kind == "start":
        frames = event.get("frames") or [0, 0]
        progress.first_frame, progress.last_frame = int(frames[0]), int(frames[-1])
        progress.total = progress.last_frame - progress.first_frame + 1
        progress.particles = int(event.get("particles", 0))
        if progress.state == "starting":
            progress.state = "running"
    elif kind == "frame":
        progress.frame = int(event["frame"])
        progress.done = int(event.get("done", progress.done + 1))
        progress.total = int(event.get("total", progress.total))
        progress.particles = int(event.get("particles", progress.particles))
        eta = event.get("eta")
        progress.eta = float(eta) if eta is not None else None
        if progress.state == "starting":
            progress.state = "running"
    elif kind == "error":
        progress.state = "failed"
        progress.message = str(event.get("message", "the engine reported an error without a message"))
    elif kind == "finished":
        progress.state = "finished"
        seconds = float(event.get("seconds", 0.0))
        progress.seconds = seconds
        progress.message = f"baked {plural(int(event.get('frames', progress.done)), 'frame')} in {format_duration(seconds)}"
    elif kind == "cancelled":
        progress.state = "cancelled"
        last = event.get("last_frame")
        progress.message = f"bake stopped; frames up to {last} were kept" if last is not None \
            else "bake stopped before the first frame"
    return progress


def finish_on_exit(progress, returncode) -> BakeProgress:
    """Settle ``progress`` once the worker has exited with ``returncode``.

    A worker that died without an ``error``/``finished``/``cancelled`` event
    (crash, killed) is reported as failed with the tail of its stderr.
    """
    if progress.is_over:
        if progress.state == "finished" and returncode not in (0, None):
            progress.state = "failed"
            progress.message = f"the bake worker exited with status {returncode} after finishing"
        return progress
    if progress.state == "cancelling" or returncode == 130:
        progress.state = "cancelled"
        progress.message = f"bake stopped; frames up to {progress.frame} were kept" if progress.frame is not None \
            else "bake stopped before the first frame"
        return progress
    progress.state = "failed"
    tail = " | ".join(progress.other_lines[-3:]) or "no output"
    if returncode == 0:
        progress.message = f"the bake worker ended without reporting a result ({tail})"
    else:
        progress.message = f"the bake worker exited with status {returncode}: {tail}"
    return progress


class BakeJob:
    """A running bake worker: ``poll()`` from the main thread, ``cancel()`` to stop it.

    Args:
        argv: the worker command (``bake_command``).
        env: environment for the child (None: inherit).
        cwd: working folder of the child.
    """

    def __init__(self, argv, env=None, cwd=None):
        self.argv = list(argv)
        self.progress = BakeProgress()
        self.cancel_requested_at = None
        self._lines = queue.Queue()
        kwargs = {}
        if os.name == "nt":
            # A separate process group lets us send CTRL_BREAK (the engine's graceful stop on Windows).
            kwargs["creationflags"] = subprocess.CREATE_NEW_PROCESS_GROUP
        self.process = subprocess.Popen(
            self.argv, stdin=subprocess.DEVNULL, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
            text=True, encoding="utf-8", errors="replace", bufsize=1, env=env, cwd=cwd, **kwargs,
        )
        self.stdout_lines = []
        self.returncode = None
        self._readers = [
            threading.Thread(target=self._pump, args=(self.process.stderr, "err"), daemon=True),
            threading.Thread(target=self._pump, args=(self.process.stdout, "out"), daemon=True),
        ]
        for reader in self._readers:
            reader.start()

    def _pump(self, stream, tag):
        # Runs in a thread: only moves text into the queue, never touches bpy.
        for line in stream:
            self._lines.put((tag, line))
        stream.close()

    def poll(self) -> list[dict]:
        """Drain the worker's output into ``progress``; returns the list of new events (dicts).

        Once the worker has exited and all its output is read, ``returncode``
        is set and ``progress`` is settled (``finish_on_exit``).
        """
        # Checked before draining: if the readers were done then, every line is already queued.
        exited = self.process.poll() is not None and not any(r.is_alive() for r in self._readers)
        events = []
        while True:
            try:
                tag, line = self._lines.get_nowait()
            except queue.Empty:
                break
            if tag == "out":
                self.stdout_lines.append(line.rstrip("\n"))
                continue
            event = parse_event(line)
            apply_event(self.progress, event if event is not None else line)
            if event is not None:
                events.append(event)
        if exited and self.returncode is None:
            self.returncode = self.process.returncode
            finish_on_exit(self.progress, self.returncode)
        return events

    @property
    def is_running(self) -> bool:
        """True until the worker has exited and its output has been read."""
        return self.returncode is None

    def cancel(self) -> None:
        """Ask the worker to stop after its current frame; a second call (or after the grace time) kills it."""
        if self.process.poll() is not None:
            return
        now = time.monotonic()
        if self.cancel_requested_at is None:
            self.cancel_requested_at = now
            self.progress.state = "cancelling"
            if os.name == "nt":
                self.process.send_signal(signal.CTRL_BREAK_EVENT)
            else:
                self.process.send_signal(signal.SIGTERM)
        else:
            self.process.kill()

    def check_grace(self) -> None:
        """Kill a cancelled worker that outlived ``CANCEL_GRACE_SECONDS``; call from the timer."""
        if self.cancel_requested_at is not None and self.process.poll() is None:
            if time.monotonic() - self.cancel_requested_at > CANCEL_GRACE_SECONDS:
                self.process.kill()

    def wait(self, on_event=None, interval=0.05) -> BakeProgress:
        """Run to the end on the calling thread (background mode); ``on_event(event)`` per event."""
        while True:
            for event in self.poll():
                if on_event is not None:
                    on_event(event)
            if self.returncode is not None:
                return self.progress
            time.sleep(interval)


class StopJob:
    """Mixin of the operators that stop a running job: ``running_job()`` names the job (or None) and
    ``stopping_message``, when set, is reported as the job is asked to stop (a second press stops it at once)."""

    stopping_message = ""

    @classmethod
    def running_job(cls) -> BakeJob | None:
        raise NotImplementedError

    @classmethod
    def poll(cls, context) -> bool:
        job = cls.running_job()
        return job is not None and job.is_running

    def execute(self, context) -> set[str]:
        self.running_job().cancel()
        if self.stopping_message:
            self.report({"INFO"}, self.stopping_message)
        return {"FINISHED"}


def tick(job, ui) -> bool:
    """One timer step of a bake: drain the worker, tell ``ui``, settle at the end.

    This is the whole body of the modal operator's TIMER branch, kept here so
    it can be tested without Blender's event loop.

    Args:
        job: a ``BakeJob``.
        ui: object with ``frame_ready(frame)``, ``progress(BakeProgress)`` and
            ``finished(BakeProgress)`` (called once, when the worker is done).

    Returns:
        True while the bake is still running.
    """
    events = job.poll()
    job.check_grace()
    for event in events:
        if event.get("event") == "frame":
            ui.frame_ready(int(event["frame"]))
    ui.progress(job.progress)
    if job.is_running:
        return True
    ui.finished(job.progress)
    return False


def run_estimate(argv, timeout=300.0, env=None) -> tuple[dict | None, str]:
    """Run the engine's ``estimate --json`` command and read its answer.

    Returns:
        (estimate dict or None, message). The dict is the engine's JSON
        (``particles``, ``memory_bytes``, ``disk_bytes``, ``seconds`` ...);
        None with the engine's one-line error when the scene is refused
        (over budget: exit status 3) or invalid.
    """
    try:
        done = subprocess.run(argv, capture_output=True, text=True, encoding="utf-8", errors="replace",
                              timeout=timeout, env=env, stdin=subprocess.DEVNULL)
    except subprocess.TimeoutExpired:
        return None, f"the estimate took longer than {timeout:.0f} s; try a coarser particle spacing"
    except OSError as exc:
        return None, f"cannot start the engine ({exc.strerror}); reinstall the extension"
    if done.returncode == 0:
        try:
            return json.loads(done.stdout), ""
        except json.JSONDecodeError:
            return None, "the engine's estimate was not valid JSON: " + (done.stdout.strip()[-200:] or "no output")
    lines = [line for line in done.stderr.splitlines() if line.strip()]
    message = lines[-1] if lines else f"the estimate failed with status {done.returncode}"
    if message.startswith("error: "):
        message = message[len("error: "):]
    for line in reversed(lines):
        event = parse_event(line)
        if event is not None and event.get("event") == "error":
            message = str(event.get("message"))
            break
    return None, message


def summarize_estimate(estimate) -> str:
    """One line for the panel: particles, memory, disk and time of an estimate dict."""
    parts = [plural(int(estimate.get("particles", 0)), "particle")]
    if "memory_bytes" in estimate:
        parts.append(f"memory ~{format_bytes(estimate['memory_bytes'])}")
    if "disk_bytes" in estimate:
        parts.append(f"disk ~{format_bytes(estimate['disk_bytes'])}")
    if "seconds" in estimate:
        rough = "" if estimate.get("is_measured", True) else " (rough until a first bake)"
        parts.append(f"time ~{format_duration(float(estimate['seconds']))}{rough}")
    return ", ".join(parts)
