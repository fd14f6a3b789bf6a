# Sourced by scripts/*: create or reuse .venv and install the project with its test extras (and the
# fast telemetry encoder, so that the tests cover both encoders and the bench measures the fast one).
# Re-installs only when pyproject.toml changed since the last install (a stamp in .venv).
set -euo pipefail

ROOT="$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)"
VENV="$ROOT/.venv"

pick_python() {
  for candidate in "${PYTHON:-}" python3.13 python3.12 python3.11 python3; do
    [ -n "$candidate" ] || continue
    if command -v "$candidate" >/dev/null 2>&1 &&
       "$candidate" -c 'import sys; sys.exit(0 if sys.version_info >= (3, 11) else 1)' 2>/dev/null; then
      echo "$candidate"; return 0
    fi
  done
  echo "meshwarden needs Python 3.11 or newer (set PYTHON=/path/to/python3.11)" >&2
  return 1
}

if [ ! -x "$VENV/bin/python" ]; then
  PY="$(pick_python)"
  echo "creating $VENV with $PY" >&2
  "$PY" -m venv "$VENV"
fi

STAMP="$VENV/.meshwarden-install-stamp"
WANT="$(cat "$ROOT/pyproject.toml" | sha256sum | cut -d' ' -f1)"
if [ ! -f "$STAMP" ] || [ "$(cat "$STAMP")" != "$WANT" ]; then
  echo "installing meshwarden and its test tools into $VENV" >&2
  "$VENV/bin/python" -m pip install --quiet --disable-pip-version-check --upgrade pip >&2
  "$VENV/bin/python" -m pip install --quiet --disable-pip-version-check -e "$ROOT[test,fast]" >&2
  echo "$WANT" > "$STAMP"
fi

export PATH="$VENV/bin:$PATH"
cd "$ROOT"
