"""A wedge started from the add-on: its command line and its progress (no bpy here).

The add-on runs ``python -m engine wedge SCENE --vary KEY=V1,V2 ... --out <shot>/v004_wedge
--progress json`` in a child process exactly as it runs a bake (``jobs.BakeJob`` reads the
child's output on a thread). The wedge's JSON events (``wedge_start``, ``variant``, ``note``,
``wedge_finished``; DEVELOPERS.md "Wedges and farm bakes") are folded into a ``WedgeProgress``
here. Each variant's cache is an ordinary cache folder inside the wedge folder, which
``versions.list_versions`` lists as one version per variant.
"""

from dataclasses import dataclass, field

from ..engine.progress import format_duration
from .jobs import boot_code, plural


def vary_arguments(rows) -> list[str]:
    """``--vary`` arguments from the panel's (key, values) rows; empty rows are skipped.

    Args:
        rows: iterable of (key, values text), e.g. ("fluid.viscosity", "0.01, 0.05").

    Returns:
        list of "KEY=V1,V2" texts, each checked by the engine's own parser.

    Raises:
        ValueError: a row with a key but no values (or values but no key), a key listed twice, or
            a row the engine refuses; the message names the row as the panel shows it.
    """
    from ..engine.errors import UsageError
    from ..engine.wedge import parse_vary

    texts, keys = [], set()
    for number, (key, values) in enumerate(rows, start=1):
        key, values = str(key).strip(), str(values).strip()
        if not key and not values:
            continue
        if not key or not values:
            missing = "Setting" if not key else "Values"
            raise ValueError(f"wedge row {number}: {missing} is empty; fill it in or remove the row")
        if key in keys:
            raise ValueError(f'wedge row {number}: "{key}" is already in an earlier row; list all its values '
                             "in one row")
        keys.add(key)
        text = f"{key}={values}"
        try:
            parse_vary(text)
        except UsageError as exc:
            raise ValueError(f"wedge row {number}: {str(exc).replace('--vary ', '', 1)}") from None
        texts.append(text)
    if not texts:
        raise ValueError("wedge: no settings to vary; add a row with a Setting (e.g. fluid.viscosity) and its "
                         "Values (e.g. 0.01, 0.05)")
    return texts


def wedge_command(python, python_args, extension_root, scene_path, out_dir, vary, solver="sph", workers=0,
                  scheduler="", wheel_site=None) -> list[str]:
    """argv of the wedge worker (the engine's command line through ``jobs.boot_code``).

    Args:
        vary: "KEY=V1,V2" texts (``vary_arguments``).
        workers: 0 bakes the variants one after another in the worker process; N > 0 on a local
            Dask cluster of N processes (needs dask[distributed] in Blender's Python).
        scheduler: a Dask scheduler address (tcp://HOST:PORT), or "" for none; wins over ``workers``.
    """
    argv = [str(python), *python_args, "-c", boot_code(extension_root, wheel_site), "wedge", str(scene_path)]
    for text in vary:
        argv += ["--vary", text]
    argv += ["--solver", solver, "--out", str(out_dir), "--progress", "json"]
    if scheduler.strip():
        argv += ["--scheduler", scheduler.strip()]
    else:
        argv += ["--workers", str(int(workers))]
    return argv


@dataclass
class WedgeProgress:
    """What the panel shows about a running wedge; updated by ``apply_wedge_event``.

    Attributes:
        state: "starting" | "running" | "finished" | "failed" | "cancelled".
        variants: {variant name: {"state", "done", "total"}} as last reported.
        where: where the variants run, as the engine said.
        message: the summary once over, or the error.
        seconds: wall time reported at the end.
    """

    state: str = "starting"
    variants: dict = field(default_factory=dict)
    where: str = ""
    message: str = ""
    seconds: float = None

    @property
    def complete(self) -> int:
        return sum(v["state"] == "complete" for v in self.variants.values())

    @property
    def fraction(self) -> float:
        """Share of all the wedge's frames finished, 0..1."""
        total = sum(v["total"] or 0 for v in self.variants.values())
        return sum(v["done"] for v in self.variants.values()) / total if total else 0.0

    @property
    def is_over(self) -> bool:
        return self.state in ("finished", "failed", "cancelled")

    def status_text(self) -> str:
        if self.state == "starting":
            return "wedge: exporting and starting the variants"
        if self.state == "running":
            return (f"wedge: {self.complete} of {plural(len(self.variants), 'variant')} complete, "
                    f"{self.fraction:.0%} of the frames ({self.where})")
        return "wedge: " + self.message


def apply_wedge_event(progress, event) -> str | None:
    """Fold one parsed wedge event into ``progress``; returns the name of a variant whose frame count
    or state changed (the add-on then lists its version), else None."""
    kind = event.get("event")
    if kind == "wedge_start":
        progress.state = "running"
        progress.where = str(event.get("where", ""))
    elif kind == "variant":
        name = str(event["variant"])
        entry = {"state": str(event.get("state")), "done": int(event.get("done") or 0), "total": event.get("total")}
        changed = progress.variants.get(name) != entry
        progress.variants[name] = entry
        if progress.state == "starting":
            progress.state = "running"
        return name if changed else None
    elif kind == "wedge_finished":
        progress.seconds = float(event.get("seconds", 0.0))
        failed = int(event.get("failed", 0))
        progress.state = "finished" if failed == 0 else "failed"
        progress.message = (f"{plural(int(event.get('complete', 0)), 'variant')} complete"
                            + (f", {failed} not complete" if failed else "")
                            + f" in {format_duration(progress.seconds)}")  # fmt: skip
    return None


def settle_wedge(progress, returncode, other_lines) -> WedgeProgress:
    """Settle ``progress`` once the worker exited: cancelled (130), or failed with the engine's error line."""
    if returncode == 130:
        progress.state = "cancelled"
        progress.message = (f"stopped; {plural(progress.complete, 'variant')} complete, finished frames kept "
                            "(start the same wedge again to resume it)")  # fmt: skip
        return progress
    errors = [line[len("error: "):] for line in other_lines if line.startswith("error: ")]
    if errors:
        progress.state = "failed"
        progress.message = errors[-1]
    elif not progress.is_over:
        progress.state = "failed"
        tail = " | ".join(other_lines[-3:]) or "no output"
        progress.message = f"the wedge worker exited with status {returncode}: {tail}"
    elif returncode not in (0, None) and progress.state == "finished":
        progress.state = "failed"
        progress.message += f" (the worker exited with status {returncode})"
    return progress
