# Shared by bin/demo and bin/test: make a virtual environment at the repository root if missing
# and install a requirements file into it.
# Usage: source bin/_venv.sh; ensure_venv requirements-test.txt [VENV_DIR (default .venv)]
set -euo pipefail
ROOT="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
PY="$ROOT/.venv/bin/python"
ensure_venv() {
    local venv="$ROOT/${2:-.venv}"
    if [ ! -x "$venv/bin/python" ]; then
        echo "creating virtual environment at $venv" >&2
        python3 -m venv "$venv"
    fi
    local stamp="$venv/.installed-$(basename "$1")"
    if [ ! -f "$stamp" ] || [ "$ROOT/$1" -nt "$stamp" ]; then
        "$venv/bin/python" -m pip install --quiet --disable-pip-version-check -r "$ROOT/$1"
        touch "$stamp"
    fi
}
