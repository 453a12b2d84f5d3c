"""The test suite (pytest; run from the repository root). A package, so tests share helpers as ``tests.<module>``."""
