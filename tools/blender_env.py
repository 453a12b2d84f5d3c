"""Helpers to run add-on checks in real Blender (the bpy module) in a child process.

Used by the add-on tests, the add-on benchmarks and ``tools/blender_demo.py``.
bpy can be imported only once per process and carries global state, so each
Blender check runs in a fresh child: ``run_child(test_file, function, ...)``
runs ``test_file`` as ``__main__`` with ``function args...`` from the repository
root (so ``engine``, ``tools`` and ``bench`` import as they do there); the child isolates Blender's
user folder (``BLENDER_USER_RESOURCES``) *before* importing bpy, runs the
named function and prints its JSON-able result on a marked line, which the
parent returns as a dict. Assertions then run in pytest, in the parent.
"""

import importlib.util
import json
import os
import subprocess
import sys
import tempfile
import time
import traceback
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
PACKAGE_ID = "splashdraft"
RESULT_MARK = "SPLASHDRAFT-RESULT "


def has_bpy():
    return importlib.util.find_spec("bpy") is not None


def run_child(test_file, function, *args, timeout=600, env=None):
    """Run ``function(*args)`` of ``test_file`` in a child Python; returns (result dict, stdout+stderr).

    Raises:
        AssertionError with the child's output when it fails or prints no result.
    """
    child_env = dict(os.environ)
    child_env.update(env or {})
    child_env["BLENDER_USER_RESOURCES"] = tempfile.mkdtemp(prefix="splashdraft_user_")
    # -c puts the working folder (the repository root) first on the child's import path.
    boot = "import runpy, sys; sys.argv = sys.argv[1:]; runpy.run_path(sys.argv[0], run_name='__main__')"
    done = subprocess.run([sys.executable, "-c", boot, str(test_file), function, *map(str, args)],
                          capture_output=True, text=True, timeout=timeout, env=child_env, cwd=str(ROOT))
    output = done.stdout + done.stderr
    for line in done.stdout.splitlines():
        if line.startswith(RESULT_MARK):
            return json.loads(line[len(RESULT_MARK):]), output
    raise AssertionError(f"child {function} failed (status {done.returncode}):\n{output[-6000:]}")


def child_main(namespace):
    """Entry point of a test file run as a script: call the named function, print its result."""
    function = namespace[sys.argv[1]]
    if not os.environ.get("BLENDER_USER_RESOURCES"):
        os.environ["BLENDER_USER_RESOURCES"] = tempfile.mkdtemp(prefix="splashdraft_user_")
    try:
        result = function(*sys.argv[2:])
    except Exception:  # noqa: BLE001 - report any failure of the child to the parent test
        traceback.print_exc()
        sys.stdout.flush()
        os._exit(1)
    print(RESULT_MARK + json.dumps(result), flush=True)
    # Skip Blender's exit handlers (slow, and noisy about leaked data blocks).
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(0)


def load_package(name="splashdraft_src"):
    """Import the repository root as a package named ``name`` (no Blender registration).

    Lets tests import ``<name>.addon.jobs`` etc. with the same relative
    imports the installed extension uses.
    """
    if name in sys.modules:
        return sys.modules[name]
    spec = importlib.util.spec_from_file_location(name, ROOT / "__init__.py",
                                                  submodule_search_locations=[str(ROOT)])
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    spec.loader.exec_module(module)
    return module


# --- inside the child (bpy imported) -------------------------------------------------------------

def enable_from_source():
    """Register the working tree as extension ``bl_ext.dev.splashdraft`` through a local repository.

    Returns the module name.
    """
    import bpy
    import addon_utils

    repo_dir = Path(tempfile.mkdtemp(prefix="splashdraft_repo_"))
    os.symlink(ROOT, repo_dir / PACKAGE_ID)
    bpy.context.preferences.extensions.repos.new(name="dev", module="dev", custom_directory=str(repo_dir),
                                                 source="USER")
    module = f"bl_ext.dev.{PACKAGE_ID}"
    errors = []
    addon_utils.enable(module, default_set=True, handle_error=lambda exc: errors.append(repr(exc)))
    if errors or addon_utils.check(module) != (True, True):
        raise RuntimeError(f"enabling {module} failed: {errors}")
    return module


def install_zip(zip_path):
    """Install and enable a built zip into the isolated user folder; returns (module name, seconds)."""
    import bpy
    import addon_utils

    start = time.perf_counter()
    bpy.ops.extensions.package_install_files(filepath=str(zip_path), repo="user_default", enable_on_install=True)
    seconds = time.perf_counter() - start
    module = f"bl_ext.user_default.{PACKAGE_ID}"
    if addon_utils.check(module) != (True, True):
        raise RuntimeError(f"{zip_path}: installed but {module} is not enabled")
    return module, seconds


def uninstall(module):
    import bpy
    import addon_utils

    addon_utils.disable(module, default_set=True)
    repo = module.split(".")[1]
    repos = [r.module for r in bpy.context.preferences.extensions.repos]
    bpy.ops.extensions.package_uninstall(repo_index=repos.index(repo), pkg_id=PACKAGE_ID)


def reset_scene():
    """Blender's factory start-up with an empty scene; call it before enabling the add-on
    (factory settings reset the preferences, add-ons and extension repositories included)."""
    import bpy

    bpy.ops.wm.read_factory_settings(use_empty=True)
    return bpy.context.scene
