# Shared by bin/demo and bin/test: make .venv at the repository root if missing and install a requirements file.
# Usage: source bin/_venv.sh; ensure_venv requirements-test.txt
set -euo pipefail
ROOT="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
PY="$ROOT/.venv/bin/python"
ensure_venv() {
    if [ ! -x "$PY" ]; then
        echo "creating virtual environment at $ROOT/.venv" >&2
        python3 -m venv "$ROOT/.venv"
    fi
    local stamp="$ROOT/.venv/.installed-$(basename "$1")"
    if [ ! -f "$stamp" ] || [ "$ROOT/$1" -nt "$stamp" ]; then
        "$PY" -m pip install --quiet --disable-pip-version-check -r "$ROOT/$1"
        touch "$stamp"
    fi
}
