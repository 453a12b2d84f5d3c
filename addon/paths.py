"""Where things live: the extension root, Blender's wheel folder, the shot's cache folders."""

import os
import sys
from pathlib import Path

import bpy

from .errors_ui import AddonError
from .versions import safe_name

#: The folder with blender_manifest.toml, engine/ and models/ (the parent of addon/).
EXTENSION_ROOT = Path(__file__).resolve().parent.parent


def wheel_site():
    """Blender's shared site-packages for extension wheels (scipy, onnxruntime), or None if absent."""
    site = Path(bpy.utils.user_resource("EXTENSIONS")) / ".local" / "lib" / (
        "python%d.%d" % sys.version_info[:2]) / "site-packages"
    return site if site.is_dir() else None


def is_learned_available():
    """True when the learned preview can run: engine/learned/ is shipped and a model file exists."""
    return (EXTENSION_ROOT / "engine" / "learned").is_dir() and any((EXTENSION_ROOT / "models").glob("*.onnx"))


def shot_name(scene):
    return safe_name(scene.splashdraft.shot_name or scene.name)


def cache_root(scene):
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


def shot_dir(scene):
    return cache_root(scene) / shot_name(scene)
