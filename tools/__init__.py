"""Developer tools, run from the repository root as modules: ``python -m tools.build_extension``,
``python -m tools.blender_demo``, ``python -m tools.fuzz_inputs``; ``tools.blender_env`` runs Blender
checks in child processes for the tests, the benchmarks and the demo."""
