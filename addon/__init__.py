"""Splashdraft for Blender: the thin add-on around the engine.

Modules: ``props`` (roles and shot settings), ``export`` (Blender scene ->
engine scene file), ``jobs`` (the bake worker process; no bpy), ``display``
(playback of a bake on a points object), ``ops`` (operators), ``ui``
(the sidebar tab), ``fidelity`` (preview against reference, measured in the
background), ``wedge_ui`` (wedges of the current shot), ``versions``, ``comparison``, ``motion``
and ``wedge_jobs`` (pure helpers; no bpy).

The bpy-using modules are imported in ``register()`` so that the pure
helpers can be imported (and tested) without Blender.
"""


def _modules():
    from . import display, fidelity, ops, props, ui, wedge_ui
    return (props, display, ops, ui, fidelity, wedge_ui)


def register() -> None:
    for module in _modules():
        module.register()


def unregister() -> None:
    for module in reversed(_modules()):
        module.unregister()
