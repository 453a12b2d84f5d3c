"""The learned preview: numpy features, the model contract and the onnxruntime stepper.

- ``features``: Froude units, gravity frame, neighbour tables, node/edge features,
  normalisation and integration (tested numpy; the same code feeds training).
- ``contract``: the JSON beside each ONNX model, checked on load (ModelError otherwise).
- ``runtime``: onnxruntime session (2 threads, ORT_ENABLE_ALL, warm-up) and tiling.
- ``solver``: ``LearnedSolver`` (Solver protocol, name "learned").
"""

from .contract import DEFAULT_MODEL_NAME, default_model_path
from .solver import LearnedSolver

__all__ = ["LearnedSolver", "DEFAULT_MODEL_NAME", "default_model_path"]
