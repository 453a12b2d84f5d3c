"""Build the Blender extension zips: one per platform, with the wheels the engine needs.

Usage (from the repository root, with the project's venv):

    .venv/bin/python -m tools.build_extension                 # linux-x64, windows-x64, macos-arm64 zips
    .venv/bin/python -m tools.build_extension --platform linux-x64
    .venv/bin/python -m tools.build_extension --no-wheels     # one quick zip without wheels (tests)

What it does:
1. Downloads (``pip download --only-binary=:all: --python-version 3.11
   --platform ... --no-deps``) scipy, onnxruntime and onnxruntime's own
   dependencies (flatbuffers, packaging, protobuf) into ``wheels/<platform>/``
   (ignored by git; reused on later runs). numpy is never bundled: Blender
   ships it (1.24 in 4.2, 1.26 in 5.0), and the scipy pin below accepts both;
   the tool reads scipy's METADATA and stops if it does not.
2. Stages the extension (manifest, root ``__init__.py``, ``addon/``,
   ``engine/``, ``models/``) in ``build/extension/`` with a manifest that lists
   the platforms and the wheels.
3. Runs Blender's own extension builder and validator (``bl_pkg``'s
   ``blender_ext.py`` from the bpy module, or ``--blender-ext PATH``):
   ``build --split-platforms`` then ``validate`` on every zip.

Zips go to ``dist/``: ``splashdraft-<version>-<platform>.zip`` (or
``splashdraft-<version>.zip`` with ``--no-wheels``). Exit status 0 on
success, 1 when a download, the build or the validation failed, 64 for bad
arguments.
"""

import argparse
import importlib.util
import re
import shutil
import subprocess
import sys
import tomllib
import zipfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

#: Blender platform name -> pip ``--platform`` tags. pip matches these literally (no older-tag
#: expansion), so the older manylinux and macOS tags that wheels actually carry are listed too.
PLATFORMS = {
    "linux-x64": ["manylinux_2_28_x86_64", "manylinux_2_27_x86_64", "manylinux_2_17_x86_64",
                  "manylinux2014_x86_64"],
    "windows-x64": ["win_amd64"],
    "macos-arm64": ["macosx_14_0_arm64", "macosx_13_0_arm64", "macosx_12_0_arm64", "macosx_11_0_arm64"],
}

#: Pinned requirements. scipy 1.13.1 declares numpy>=1.22.4,<2.3: fits Blender 4.2 (numpy 1.24.3) and 5.0 (1.26.4).
REQUIREMENTS = ["scipy==1.13.1", "onnxruntime==1.32.0", "flatbuffers==25.12.19", "packaging==26.3",
                "protobuf==6.33.6"]

#: numpy versions of the Blender releases we support (the scipy wheel must accept both).
BLENDER_NUMPY = {"4.2": "1.24.3", "5.0": "1.26.4"}

#: Top-level entries of the repository that go into the extension (the manifest's excludes still apply).
SHIPPED = ["blender_manifest.toml", "__init__.py", "addon", "engine", "models", "README.md"]

PYTHON_VERSION = "3.11"


def find_blender_ext(explicit=None):
    """(blender_ext.py, tags.py) of Blender's extension tools; from the bpy module unless given."""
    if explicit:
        script = Path(explicit)
        tags = next(script.parents[4].glob("modules/_bpy_internal/extensions/tags.py"), None) \
            if len(script.parents) > 4 else None
        return script, tags
    spec = importlib.util.find_spec("bpy")  # locates the package without importing it
    if spec is None or not spec.submodule_search_locations:
        raise SystemExit("build_extension: the bpy module is not installed; "
                         "install it (pip install bpy) or pass --blender-ext PATH/TO/blender_ext.py")
    base = Path(list(spec.submodule_search_locations)[0])
    scripts = sorted(base.glob("*/scripts/addons_core/bl_pkg/cli/blender_ext.py"))
    if not scripts:
        raise SystemExit(f"build_extension: no bl_pkg/cli/blender_ext.py under {base}; pass --blender-ext")
    script = scripts[-1]
    tags = script.parents[3] / "modules" / "_bpy_internal" / "extensions" / "tags.py"
    return script, tags if tags.exists() else None


def download_wheels(platform, cache_dir):
    """Fetch the pinned wheels for one platform into ``cache_dir/<platform>``; returns their paths."""
    target = Path(cache_dir) / platform
    target.mkdir(parents=True, exist_ok=True)
    command = [sys.executable, "-m", "pip", "download", "--no-deps", "--only-binary=:all:",
               "--python-version", PYTHON_VERSION, "--implementation", "cp", "--dest", str(target)]
    for tag in PLATFORMS[platform]:
        command += ["--platform", tag]
    command += REQUIREMENTS
    print(f"build_extension: fetching wheels for {platform} -> {target}", flush=True)
    done = subprocess.run(command, capture_output=True, text=True)
    if done.returncode != 0:
        raise RuntimeError(f"pip download for {platform} failed:\n{done.stderr.strip()[-2000:]}")
    wanted = {re.split(r"[=<>]", r)[0].lower(): r.split("==")[1] for r in REQUIREMENTS}
    wheels = []
    for wheel in sorted(target.glob("*.whl")):
        name, version = wheel.name.split("-")[:2]
        if wanted.get(name.lower().replace("_", "-")) == version:
            wheels.append(wheel)
    missing = set(wanted) - {w.name.split("-")[0].lower().replace("_", "-") for w in wheels}
    if missing:
        raise RuntimeError(f"{platform}: no wheel found for {', '.join(sorted(missing))}")
    return wheels


def requires_numpy(wheel):
    """The ``Requires-Dist: numpy...`` specifier in a wheel's METADATA ('' if none)."""
    with zipfile.ZipFile(wheel) as archive:
        name = next(n for n in archive.namelist() if n.endswith(".dist-info/METADATA"))
        text = archive.read(name).decode("utf-8", "replace")
    for line in text.splitlines():
        match = re.match(r"Requires-Dist:\s*numpy\s*([^;]*)", line)
        if match:
            return match.group(1).strip().strip("()")
    return ""


def check_numpy_pins(wheels):
    """Stop if a bundled wheel rejects the numpy of a supported Blender release."""
    from packaging.specifiers import SpecifierSet

    for wheel in wheels:
        spec = requires_numpy(wheel)
        if not spec:
            continue
        for blender, numpy_version in BLENDER_NUMPY.items():
            if numpy_version not in SpecifierSet(spec):
                raise RuntimeError(f"{wheel.name}: needs numpy {spec}, but Blender {blender} ships numpy "
                                   f"{numpy_version}; pin an older release in REQUIREMENTS")
        print(f"build_extension: {wheel.name} needs numpy {spec}: fits Blender "
              + ", ".join(f"{b} (numpy {n})" for b, n in BLENDER_NUMPY.items()))


def staged_manifest(text, platforms, wheel_names):
    """The repository manifest with ``platforms`` and ``wheels`` added and ``/wheels/`` no longer excluded."""
    text = re.sub(r'^\s*"/wheels/",\s*\n', "", text, flags=re.MULTILINE)
    extra = ""
    if platforms:
        extra += "platforms = [" + ", ".join(f'"{p}"' for p in platforms) + "]\n"
    if wheel_names:
        extra += "wheels = [\n" + "".join(f'  "./wheels/{n}",\n' for n in wheel_names) + "]\n"
    text = text.replace("\n[permissions]", "\n" + extra + "\n[permissions]", 1)
    tomllib.loads(text)  # fail here, not in Blender, if the edit broke the TOML
    return text


def stage(stage_dir, platforms, wheels):
    """Copy the shipped files and the wheels into ``stage_dir`` with the staged manifest."""
    if stage_dir.exists():
        shutil.rmtree(stage_dir)
    stage_dir.mkdir(parents=True)
    for name in SHIPPED:
        source = ROOT / name
        if source.is_dir():
            shutil.copytree(source, stage_dir / name, ignore=shutil.ignore_patterns("__pycache__", "*.pyc"))
        elif source.exists():
            shutil.copy2(source, stage_dir / name)
    names = []
    if wheels:
        (stage_dir / "wheels").mkdir()
        for wheel in wheels:
            if wheel.name not in names:
                shutil.copy2(wheel, stage_dir / "wheels" / wheel.name)
                names.append(wheel.name)
    text = (ROOT / "blender_manifest.toml").read_text(encoding="utf-8")
    (stage_dir / "blender_manifest.toml").write_text(staged_manifest(text, platforms, sorted(names)),
                                                     encoding="utf-8")


def run_blender_ext(script, tags, *args):
    command = [sys.executable, str(script), *args]
    if tags is not None and args[0] in ("build", "validate"):
        command[3:3] = ["--valid-tags", str(tags)]
    done = subprocess.run(command, capture_output=True, text=True)
    output = (done.stdout + done.stderr).strip()
    if done.returncode != 0 or "FATAL_ERROR" in output or "Error:" in output:
        raise RuntimeError(f"blender_ext {' '.join(args[:1])} failed:\n{output[-3000:]}")
    return output


def build(platforms, use_wheels=True, out_dir=ROOT / "dist", cache_dir=ROOT / "wheels", blender_ext=None,
          stage_dir=ROOT / "build" / "extension"):
    """Build and validate the zips; returns the list of zip paths."""
    script, tags = find_blender_ext(blender_ext)
    wheels = []
    if use_wheels:
        for platform in platforms:
            wheels += download_wheels(platform, cache_dir)
        check_numpy_pins(wheels)
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    manifest = tomllib.loads((ROOT / "blender_manifest.toml").read_text(encoding="utf-8"))
    stem = f"{manifest['id']}-{manifest['version']}"
    stage(Path(stage_dir), platforms if use_wheels else [], wheels)
    # Remove only the zips this kind of build writes (a quick build keeps the platform zips and back).
    old_names = [f"{stem}-{p.replace('-', '_')}.zip" for p in platforms] if use_wheels else [f"{stem}.zip"]
    for name in old_names:
        (out_dir / name).unlink(missing_ok=True)
    args = ["build", "--source-dir", str(stage_dir), "--output-dir", str(out_dir)]
    if use_wheels:
        args.append("--split-platforms")
    print(run_blender_ext(script, tags, *args).splitlines()[-1])
    zips = sorted(p for p in (out_dir / name for name in old_names) if p.exists())
    if len(zips) != len(old_names):
        raise RuntimeError(f"blender_ext build wrote no {stem}*.zip into {out_dir}")
    for path in zips:
        run_blender_ext(script, tags, "validate", str(path))
        print(f"build_extension: {path.relative_to(ROOT) if path.is_relative_to(ROOT) else path} "
              f"({path.stat().st_size / 1e6:.1f} MB), validated")
    return zips


def main(argv=None):
    parser = argparse.ArgumentParser(
        prog="build_extension", description="Build the Splashdraft Blender extension zips into dist/.")
    parser.add_argument("--platform", action="append", choices=sorted(PLATFORMS),
                        help="Platform to build (repeatable). Default: all of " + ", ".join(PLATFORMS) + ".")
    parser.add_argument("--no-wheels", action="store_true",
                        help="Build one zip for all platforms without bundled wheels (scipy must then be "
                        "present in Blender's Python); quick, for tests.")
    parser.add_argument("--out", type=Path, default=ROOT / "dist", help="Output folder. Default: dist/.")
    parser.add_argument("--wheels-cache", type=Path, default=ROOT / "wheels",
                        help="Folder that keeps downloaded wheels between runs. Default: wheels/.")
    parser.add_argument("--blender-ext", help="Path of Blender's bl_pkg/cli/blender_ext.py "
                        "(default: the one inside the installed bpy module).")
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:
        return 64 if exc.code else 0
    platforms = args.platform or list(PLATFORMS)
    try:
        build(platforms, use_wheels=not args.no_wheels, out_dir=args.out, cache_dir=args.wheels_cache,
              blender_ext=args.blender_ext)
    except RuntimeError as exc:
        print(f"build_extension: {exc}", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
