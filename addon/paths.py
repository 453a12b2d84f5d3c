"""Where things live: the extension root, Blender's wheel folder, the shot's cache folders."""

import os
import sys
from pathlib import Path

import bpy

from .errors_ui import AddonError
from .versions import safe_name

#: The folder with blender_manifest.toml, engine/ and models/ (the parent of addon/).
EXTENSION_ROOT = Path(__file__).resolve().parent.parent


def wheel_site() -> Path | None:
    """Blender's shared site-packages for extension wheels (scipy, onnxruntime), or None if absent."""
    site = Path(bpy.utils.user_resource("EXTENSIONS")) / ".local" / "lib" / (
        "python%d.%d" % sys.version_info[:2]) / "site-packages"
    return site if site.is_dir() else None


_models_seen = {}  # models folder -> (its modification time, learned_model() for it)


def learned_model() -> Path | None:
    """The learned preview's model: the shipped default if it passes its contract check, else the
    first installed model that does (``engine.solvers.installed_models``); None when none does.

    The contract check reads the model, so the answer is kept until the models folder changes
    (the panel asks on every redraw).
    """
    folder = EXTENSION_ROOT / "models"
    try:
        stamp = folder.stat().st_mtime_ns
    except OSError:
        return None
    if _models_seen.get(folder, (None,))[0] != stamp:
        try:
            from ..engine.learned.contract import DEFAULT_MODEL_NAME
            from ..engine.solvers import installed_models

            models = installed_models(folder)
        except ImportError:  # the engine's learned preview is not shipped in this build
            models = []
        chosen = next((path for name, path in models if path.stem == DEFAULT_MODEL_NAME), None)
        _models_seen[folder] = (stamp, chosen or (models[0][1] if models else None))
    return _models_seen[folder][1]


def is_learned_available() -> bool:
    """True when the learned preview can run: an installed model passes its contract check."""
    return learned_model() is not None


def shot_name(scene) -> str:
    return safe_name(scene.splashdraft.shot_name or scene.name)


def cache_root(scene) -> Path:
    """Absolute cache folder of the scene's shot settings.

    Raises:
        AddonError: the folder is relative to an unsaved .blend.
    """
    raw = scene.splashdraft.cache_dir.strip() or "//splashdraft_cache/"
    if raw.startswith("//") and not bpy.data.filepath:
        raise AddonError(
            f'cache folder "{raw}" is relative to the .blend file, which is not saved yet; '
            "save the .blend or set an absolute Cache folder")
    return Path(os.path.abspath(bpy.path.abspath(raw)))


def shot_dir(scene) -> Path:
    return cache_root(scene) / shot_name(scene)
