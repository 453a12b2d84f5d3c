"""Training of the learned preview (optional; needs PyTorch): data generation, model, training, ONNX export.

Entry points: ``python -m training.generate`` (procedural shots baked with the
reference solver) and ``python -m training.train`` (fit, checkpoint, export).
"""
