"""The shipped models as package data (installed as ``splashdraft_models``; see pyproject.toml).

Each model is three files: ``<name>.onnx`` (the learned core), ``<name>.json`` (its contract,
checked when it loads) and ``<name>.md`` (its card). No code lives here.
"""
