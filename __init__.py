"""Splashdraft: the Blender extension's package root (blender_manifest.toml lives here).

Blender imports this folder as ``bl_ext.<repo>.splashdraft`` and calls
``register()``. The bake worker imports it under the same name
(``addon.jobs.boot_code``) to reach ``<name>.engine``; outside Blender the
engine is the installed top-level package ``engine``. So this file imports
nothing at module level: importing the engine never pulls in bpy, and
``addon`` is imported only when Blender registers the extension.
"""


def register():
    from . import addon
    addon.register()


def unregister():
    from . import addon
    addon.unregister()
