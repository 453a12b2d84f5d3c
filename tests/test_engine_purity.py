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


#: The commands: they use the solvers, the caches and the measures; no module below them imports them.
COMMANDS = {"engine.bake", "engine.cli", "engine.compare", "engine.demo", "engine.estimate", "engine.farm",
            "engine.validate", "engine.wedge", "engine.solvers"}


def _engine_imports(path):
    """Engine modules imported anywhere in ``path`` (module level or inside functions), as dotted names."""
    import ast

    module = ".".join(path.relative_to(ROOT).with_suffix("").parts)
    package = module if path.name == "__init__.py" else module.rpartition(".")[0]
    found = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            found.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            base = package.split(".")
            base = base[: len(base) - node.level + 1] if node.level else []
            name = ".".join(base + ([node.module] if node.module else []))
            found.add(name)
            found.update(f"{name}.{alias.name}" for alias in node.names)
    return {name for name in found if name == "engine" or name.startswith("engine.")}


def test_no_import_climbs_the_layers():
    """The learned preview and the shared measures import no command module; compare imports no solver.

    Source: issue 15 ("no import climbs up the layers") and docs/style.md ("each layer uses only
    the layers below it").
    """
    climbs = []
    for path in sorted((ROOT / "engine").rglob("*.py")):
        module = ".".join(path.relative_to(ROOT).with_suffix("").parts)
        imported = _engine_imports(path)
        if module.startswith("engine.learned") or module in ("engine.measures", "engine.pngplot", "engine.kernels"):
            climbs += [f"{module} -> {name}" for name in sorted(imported & COMMANDS)]
        if module == "engine.compare":
            climbs += [f"{module} -> {name}" for name in sorted(imported) if name.startswith("engine.learned")]
    assert climbs == []
