"""Splashdraft: the Blender extension's package root (blender_manifest.toml lives here).

Blender imports this folder as ``bl_ext.<repo>.splashdraft`` and calls
``register()``; inside Blender the engine is only ``bl_ext.<repo>.splashdraft.engine``.
Outside Blender's process (the bake worker, ``addon.jobs.boot_code``, and any
``pip install`` of the checkout) the engine is the top-level package ``engine``.
This file imports nothing at module level: importing the engine never pulls in
bpy, and ``addon`` is imported only when Blender registers the extension.
"""


def register():
    from . import addon
    addon.register()


def unregister():
    from . import addon
    addon.unregister()
