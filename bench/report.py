"""Where the benchmarks keep their JSON results: one file per benchmark under ``bench/results/``."""

import json
from pathlib import Path

RESULTS = Path(__file__).resolve().parent / "results"


def write_result(name: str, result: dict) -> Path:
    """Write ``result`` as indented JSON to ``bench/results/<name>`` and return the path."""
    RESULTS.mkdir(parents=True, exist_ok=True)
    target = RESULTS / name
    target.write_text(json.dumps(result, indent=1) + "\n")
    return target
