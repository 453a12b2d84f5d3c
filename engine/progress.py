"""Bake progress: a terminal progress bar, JSON-line events, or nothing.

All three reporters share one small interface, called by the bake loop:

    start(frames=(a, b), solver=name, particles=n)
    frame(frame=f, done=k, total=m, particles=n, substeps=s, seconds=x, eta=y)
    error(message)
    finished(frames=k, cache=dir, seconds=x)
    cancelled(last_frame=f)
    note(text)                       # free text for people; JSON mode drops it

``seconds`` of a frame is its wall-clock time; ``eta`` is the estimated
wall-clock seconds left. Everything goes to stderr (stdout is kept for machine
output such as ``info --json``). The JSON events are one object per line,
exactly as listed in DEVELOPERS.md; the Blender add-on parses them.
"""

import json
import math
import sys

PROGRESS_KINDS = ("bar", "json", "none")


def format_duration(seconds) -> str:
    """'4.2s', '3m05s' or '1h02m' for a duration in seconds; '?' if unknown.

    The one way durations are written, by the command line and by the Blender add-on's status lines.
    """
    if seconds is None or seconds != seconds or seconds < 0:
        return "?"
    if seconds < 60:
        return f"{seconds:.1f}s"
    minutes, secs = divmod(int(round(seconds)), 60)
    if minutes < 60:
        return f"{minutes}m{secs:02d}s"
    hours, minutes = divmod(minutes, 60)
    return f"{hours}h{minutes:02d}m"


def _finite_or_none(value):
    """JSON has no NaN: an unknown ETA is sent as null."""
    return round(float(value), 2) if value is not None and math.isfinite(value) else None


class SilentProgress:
    """Reports nothing (``--progress none``)."""

    def start(self, frames, solver, particles) -> None:
        pass

    def frame(self, frame, done, total, particles, substeps, seconds, eta) -> None:
        pass

    def error(self, message) -> None:
        pass

    def finished(self, frames, cache, seconds) -> None:
        pass

    def cancelled(self, last_frame) -> None:
        pass

    def note(self, text) -> None:
        pass


class JsonProgress(SilentProgress):
    """One JSON object per line (``--progress json``); see DEVELOPERS.md for the events."""

    def __init__(self, stream=None):
        self.stream = stream if stream is not None else sys.stderr

    def _emit(self, **event):
        self.stream.write(json.dumps(event) + "\n")
        self.stream.flush()

    def start(self, frames, solver, particles) -> None:
        self._emit(event="start", frames=[int(frames[0]), int(frames[1])], solver=solver, particles=int(particles))

    def frame(self, frame, done, total, particles, substeps, seconds, eta) -> None:
        self._emit(
            event="frame", frame=int(frame), done=int(done), total=int(total), particles=int(particles),
            substeps=int(substeps), seconds=round(float(seconds), 4), eta=_finite_or_none(eta),
        )  # fmt: skip

    def error(self, message) -> None:
        self._emit(event="error", message=str(message))

    def finished(self, frames, cache, seconds) -> None:
        self._emit(event="finished", frames=int(frames), cache=str(cache), seconds=round(float(seconds), 3))

    def cancelled(self, last_frame) -> None:
        self._emit(event="cancelled", last_frame=None if last_frame is None else int(last_frame))


class BarProgress(SilentProgress):
    """A progress bar on stderr: redrawn in place on a terminal, one line per frame otherwise."""

    width = 24

    def __init__(self, stream=None, is_terminal=None):
        self.stream = stream if stream is not None else sys.stderr
        if is_terminal is None:
            is_terminal = bool(getattr(self.stream, "isatty", lambda: False)())
        self.is_terminal = is_terminal
        self._drawn = 0  # length of the bar line now on screen (terminal mode)

    def _line(self, text):
        if self._drawn:
            self.stream.write("\n")
            self._drawn = 0
        self.stream.write(text + "\n")
        self.stream.flush()

    def start(self, frames, solver, particles) -> None:
        self._line(f"baking frames {frames[0]}..{frames[1]} with the {solver} solver, {particles:,} particles")

    def frame(self, frame, done, total, particles, substeps, seconds, eta) -> None:
        filled = int(self.width * done / total) if total else self.width
        bar = "#" * filled + "." * (self.width - filled)
        text = (
            f"frame {frame} [{bar}] {done}/{total} | {particles:,} particles | {substeps} substeps | "
            f"{seconds:.2f} s/frame | ETA {format_duration(eta)}"
        )
        if self.is_terminal:
            pad = max(0, self._drawn - len(text))
            self.stream.write("\r" + text + " " * pad)
            self.stream.flush()
            self._drawn = len(text)
        else:
            self._line(text)

    def error(self, message) -> None:
        # The command line prints the error itself, once; here the bar's line is only ended.
        if self._drawn:
            self.stream.write("\n")
            self.stream.flush()
            self._drawn = 0

    def finished(self, frames, cache, seconds) -> None:
        self._line(f"finished {frames} frames in {format_duration(seconds)}; cache in {cache}")

    def cancelled(self, last_frame) -> None:
        where = "no frame was finished" if last_frame is None else f"frames up to {last_frame} are kept"
        self._line(f"bake cancelled; {where} (continue with --resume)")

    def note(self, text) -> None:
        self._line(text)


def make_progress(kind="bar", stream=None) -> "SilentProgress":
    """The reporter for ``--progress {bar,json,none}``."""
    if kind == "bar":
        return BarProgress(stream)
    if kind == "json":
        return JsonProgress(stream)
    if kind == "none":
        return SilentProgress()
    raise ValueError(f"progress kind {kind!r} is not one of {', '.join(PROGRESS_KINDS)}")
