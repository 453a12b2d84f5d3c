"""Splashdraft: the Blender extension's package root (blender_manifest.toml lives here).

Blender imports this folder as ``bl_ext.<repo>.splashdraft`` and calls
``register()``. The engine next to it is also a plain top-level package
(``python -m engine``, and the bake worker imports it as ``engine``), so this
file imports nothing at module level: importing the engine never pulls in
bpy, and ``addon`` is imported only when Blender registers the extension.
"""


def register():
    from . import addon
    addon.register()


def unregister():
    from . import addon
    addon.unregister()
