"""Splashdraft engine: liquid splash previews and reference bakes as point caches.

Pure Python on numpy, scipy and (for the learned preview) onnxruntime. Nothing
in this package imports bpy; the Blender add-on in ``addon/`` drives it through
the command line or through these functions.

Data flows as plain arrays: scene -> geometry sampling -> neighbours ->
solver step -> cache. Each module owns one of those steps.
"""

__version__ = "0.1.0"
