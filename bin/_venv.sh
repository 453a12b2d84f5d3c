# Shared by bin/demo and bin/test: make a virtual environment at the repository root if missing,
# install a requirements file into it (the pinned versions) and this checkout's engine (pyproject.toml,
# editable, no further dependencies), so `import engine` and `python -m engine` work from any folder.
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
    local engine_stamp="$venv/.installed-engine"
    if [ ! -f "$engine_stamp" ] || [ "$ROOT/pyproject.toml" -nt "$engine_stamp" ] \
        || [ "$(cat "$engine_stamp")" != "$ROOT" ]; then
        "$venv/bin/python" -m pip install --quiet --disable-pip-version-check --no-deps -e "$ROOT"
        echo "$ROOT" > "$engine_stamp"
    fi
}
