"""Preview against reference (no bpy): which two versions, the worker command, the stored report
and the lines the panel shows.

The numbers come from the engine's ``compare`` command (``engine.compare``), run in a child
process like a bake. Its result is kept beside the preview version it measures, as
``<preview folder>/compare_<reference version>.json`` (the engine's JSON), ``.txt`` (its
per-frame table) and ``.png`` (its plot), so the panel shows it again after the .blend is
reopened, for as long as both versions exist.
"""

import json
import os
from pathlib import Path

from .jobs import boot_code

REPORT_PREFIX = "compare_"


def pick_pair(versions, shown_name) -> tuple[str, str] | None:
    """The (reference, preview) version names to compare, or None.

    Args:
        versions: list of dicts with ``name``, ``solver`` ("sph" | "learned") and ``frames``,
            oldest first (the Bakes list).
        shown_name: the version shown now.

    The shown version is one side; the other is the newest version of the other solver that has
    finished frames.
    """
    shown = next((v for v in versions if v["name"] == shown_name), None)
    if shown is None or not shown["frames"] or shown["solver"] not in ("sph", "learned"):
        return None
    other_solver = "sph" if shown["solver"] == "learned" else "learned"
    others = [v for v in versions if v["solver"] == other_solver and v["frames"] and v["name"] != shown_name]
    if not others:
        return None
    if shown["solver"] == "learned":
        return others[-1]["name"], shown["name"]
    return shown["name"], others[-1]["name"]


def report_paths(preview_folder, reference_name) -> tuple[Path, Path, Path]:
    """(json, txt, png) paths of the comparison of ``preview_folder`` against ``reference_name``."""
    base = Path(preview_folder) / f"{REPORT_PREFIX}{reference_name}"
    return base.with_suffix(".json"), base.with_suffix(".txt"), base.with_suffix(".png")


def compare_command(python, python_args, extension_root, reference_dir, preview_dir, plot_path, wheel_site=None) -> list[str]:
    """argv of ``python -m engine compare REFERENCE PREVIEW --json --plot PNG --progress json``."""
    return [str(python), *python_args, "-c", boot_code(extension_root, wheel_site), "compare",
            str(reference_dir), str(preview_dir), "--json", "--plot", str(plot_path), "--progress", "json"]


def parse_result(stdout_lines) -> dict | None:
    """The engine's JSON result from the worker's stdout lines, or None when it is not there."""
    text = "\n".join(stdout_lines).strip()
    start = text.find("{")
    if start < 0:
        return None
    try:
        result = json.loads(text[start:])
    except json.JSONDecodeError:
        return None
    return result if isinstance(result, dict) and isinstance(result.get("frames"), list) else None


def short_message(message, folders) -> str:
    """The engine's message for the sidebar: each version folder replaced by the version's name.

    Args:
        message: text from the engine. folders: version name -> folder path.
    """
    for name, folder in folders.items():
        for form in {str(folder), str(Path(folder).resolve())}:
            message = message.replace(form.rstrip("/"), name)
    return message


def write_report(result, json_path, table_text="") -> None:
    """Store ``result`` (and the per-frame table) beside the preview, each file written then renamed."""
    for path, text in ((Path(json_path), json.dumps(result, indent=1) + "\n"),
                       (Path(json_path).with_suffix(".txt"), table_text + "\n")):
        temporary = path.with_name(f".{path.name}.tmp-{os.getpid()}")
        temporary.write_text(text, encoding="utf-8")
        os.replace(temporary, path)


def read_report(json_path) -> dict | None:
    """The stored result, or None when there is none or it cannot be read."""
    try:
        result = json.loads(Path(json_path).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return result if isinstance(result, dict) and isinstance(result.get("frames"), list) else None


def summary(result) -> dict:
    """The panel's figures from an ``engine.compare`` result.

    Returns a dict: ``frames``, ``mean_chamfer`` and ``max_chamfer`` (particle spacings),
    ``worst_frame``, ``energy_ratio`` (kinetic energy of the preview summed over the frames,
    over the reference's; None when the reference never moves), ``over_energy_reference`` and
    ``over_energy_preview`` (fractions, None when not audited), ``density`` (fraction of the
    preview's interior particles within 3 % of rest density, None when none is interior).
    """
    rows = result["frames"]
    worst = max(rows, key=lambda row: row["chamfer_spacings"]) if rows else None
    energy_a = sum(row["kinetic_energy_a_j"] for row in rows)
    energy_b = sum(row["kinetic_energy_b_j"] for row in rows)
    return {
        "frames": len(rows),
        "mean_chamfer": result.get("mean_chamfer_spacings"),
        "max_chamfer": result.get("max_chamfer_spacings"),
        "worst_frame": worst["frame"] if worst else None,
        "energy_ratio": energy_b / energy_a if energy_a > 0 else None,
        "over_energy_reference": result.get("over_energy_fraction_a"),
        "over_energy_preview": result.get("over_energy_fraction_b"),
        "density": result.get("density_within_3pct_fraction"),
    }


def _percent(value):
    return "not audited" if value is None else f"{100 * value:.1f} %"


def summary_lines(result) -> list[str]:
    """Short lines for the sidebar (each well under 50 characters)."""
    figures = summary(result)
    ratio = figures["energy_ratio"]
    lines = [
        f"{figures['frames']} frames compared",
        f"Distance: mean {figures['mean_chamfer']:.2f}, worst {figures['max_chamfer']:.2f} spacings",
        f"Worst frame: {figures['worst_frame']}",
        "Motion energy: reference at rest" if ratio is None else f"Motion energy: {ratio:.2f} x reference",
        f"Over-energy: preview {_percent(figures['over_energy_preview'])}",
        f"Over-energy: reference {_percent(figures['over_energy_reference'])}",
    ]
    if figures["density"] is not None:
        lines.append(f"Density within 3 %: {100 * figures['density']:.0f} % of interior")
    return lines


def frame_lines(result, limit=12) -> list[str]:
    """Per-frame lines (frame, distance in spacings, energy ratio), at most ``limit``, spread evenly."""
    rows = result["frames"]
    if len(rows) > limit:
        step = (len(rows) - 1) / (limit - 1)
        rows = [rows[round(k * step)] for k in range(limit)]
    lines = []
    for row in rows:
        energy_a = row["kinetic_energy_a_j"]
        ratio = f"{row['kinetic_energy_b_j'] / energy_a:.2f}x" if energy_a > 0 else "-"
        lines.append(f"{row['frame']:>5}: {row['chamfer_spacings']:.2f} sp, energy {ratio}")
    return lines
