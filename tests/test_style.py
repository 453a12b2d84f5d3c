"""House style checked on the source: every public function says what it returns.

Source: issue 15, item 6 ("return types on public functions"). This checks a house rule on our own
code, not a result of the engine, so it needs no outside reference.
"""

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

#: The folders whose public functions and methods must carry a return annotation.
CHECKED = ("engine", "training", "addon")


def _unannotated(path, root=ROOT):
    """``path:line name`` of each public function or method (nested ones too) with no return annotation."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    return [f"{path.relative_to(root).as_posix()}:{node.lineno} {node.name}"
            for node in ast.walk(tree)
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef))
            and not node.name.startswith("_") and node.returns is None]


def test_every_public_function_has_a_return_annotation():
    files = [p for folder in CHECKED for p in sorted((ROOT / folder).rglob("*.py"))]
    assert len(files) > 40, f"found only {len(files)} source files under {CHECKED}"
    missing = [entry for path in files for entry in _unannotated(path)]
    assert missing == [], "add a return annotation (-> None when it returns nothing) to:\n" + "\n".join(missing)


def test_the_check_sees_a_missing_annotation(tmp_path):
    """The walker finds unannotated public functions, nested and in classes, and skips private ones."""
    source = tmp_path / "sample.py"
    source.write_text("def shown(x):\n    def inner():\n        pass\n    return x\n\n"
                      "class Thing:\n    def method(self) -> int:\n        return 1\n    def bare(self):\n        pass\n\n"
                      "def _private():\n    pass\n", encoding="utf-8")
    found = _unannotated(source, root=tmp_path)
    assert found == ["sample.py:1 shown", "sample.py:2 inner", "sample.py:9 bare"]
