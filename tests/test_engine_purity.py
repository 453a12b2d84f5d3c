"""The engine must stay pure Python on numpy/scipy/onnxruntime: importing it never imports bpy.

Source: project design card (DEVELOPERS.md, "engine/ never imports bpy"); checked in a fresh
interpreter so modules imported by other tests cannot hide a stray import.
"""

import pkgutil
import subprocess
import sys
from pathlib import Path

import engine

ROOT = Path(__file__).resolve().parents[1]


def test_importing_every_engine_module_does_not_import_bpy():
    names = [m.name for m in pkgutil.walk_packages(engine.__path__, "engine.") if not m.name.endswith("__main__")]
    assert "engine.sph" in names or len(names) >= 4, names
    code = (
        "import importlib, sys\n"
        f"for name in {names!r}:\n"
        "    importlib.import_module(name)\n"
        "bad = sorted(m for m in sys.modules if m == 'bpy' or m.startswith('bpy.') or m == 'torch')\n"
        "print(','.join(bad))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "", f"engine imported {out.stdout.strip()}"


def test_no_engine_source_mentions_bpy_import():
    offenders = [
        str(p.relative_to(ROOT))
        for p in (ROOT / "engine").rglob("*.py")
        if "import bpy" in p.read_text(encoding="utf-8")
    ]
    assert offenders == []
