# Shared by scripts/test, scripts/demo and scripts/bench: make or reuse .venv
# and install the project from its own files (only when pyproject.toml changed).
set -euo pipefail
ROOT="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
VENV="${WAVESWEEP_VENV:-$ROOT/.venv}"
PY="${PYTHON:-python3}"
if ! "$PY" -c 'import sys; sys.exit(sys.version_info < (3, 11))' 2>/dev/null; then
    echo "wavesweep needs Python 3.11 or newer (found: $("$PY" --version 2>&1)); set PYTHON=..." >&2
    exit 2
fi
if [ ! -x "$VENV/bin/python" ]; then
    echo "setting up $VENV ..." >&2
    "$PY" -m venv "$VENV"
fi
STAMP="$VENV/.wavesweep-installed"
WANT="$(cat "$ROOT/pyproject.toml" | sha256sum | cut -d' ' -f1)"
if [ ! -f "$STAMP" ] || [ "$(cat "$STAMP")" != "$WANT" ] || ! "$VENV/bin/python" -c 'import wavesweep' 2>/dev/null; then
    echo "installing wavesweep and its dependencies into $VENV ..." >&2
    "$VENV/bin/python" -m pip install --quiet --upgrade pip >&2
    "$VENV/bin/python" -m pip install --quiet -e "$ROOT[test,fast,video,cluster]" >&2
    echo "$WANT" > "$STAMP"
fi
export PATH="$VENV/bin:$PATH"
