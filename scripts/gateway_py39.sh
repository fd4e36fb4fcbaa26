#!/usr/bin/env bash
# Build (once per machine) a Python 3.9 venv with the oldest numpy the board profiles promise
# (boards/a53-512.toml: python 3.9, numpy 1.19) and the optional MQTT client, so tests can run a
# bundle on the oldest gateway interpreter we support.
#
#   scripts/gateway_py39.sh [VENV]     default VENV: ${XDG_CACHE_HOME:-$HOME/.cache}/ganlet/py39-venv
#
# The interpreter: $GANLET_PY39 if set, else pyenv's 3.9.x, else python3.9 on PATH.
# Rerunning with VENV built reuses it and only prints the versions. GANLET_NO_BUILD=1: never
# build, fail if VENV is not ready. The last line is "versions: python=X numpy=Y paho-mqtt=Z".
set -euo pipefail

VENV="${1:-${XDG_CACHE_HOME:-$HOME/.cache}/ganlet/py39-venv}"
# numpy 1.19.5 is the last 1.19 release and the first with cp39 wheels; paho-mqtt 2.x is the
# current client API (Debian bookworm's python3-paho-mqtt, in the arm64 userland, is 1.6.1).
REQUIREMENTS=(numpy==1.19.5 paho-mqtt==2.1.0)
RECIPE="v1 ${REQUIREMENTS[*]}"
MARKER="$VENV/.ganlet-py39-ready"

die() { echo "gateway_py39: $*" >&2; exit 1; }

find_python39() {
    local candidate
    for candidate in "${GANLET_PY39:-}" "$HOME"/.pyenv/versions/3.9.*/bin/python3.9 \
        "$(command -v python3.9 || true)"; do
        [ -x "$candidate" ] || continue
        "$candidate" -c 'import sys; assert sys.version_info[:2] == (3, 9)' 2>/dev/null \
            && { echo "$candidate"; return; }
    done
    die "no Python 3.9 interpreter (looked for \$GANLET_PY39, ~/.pyenv/versions/3.9.*, python3.9 on PATH)"
}

SMOKE="$(cd "$(dirname "$0")" && pwd)/gateway_smoke.py"  # imports, one matmul, the versions line

mkdir -p "$(dirname "$VENV")"
exec 9>"$VENV.lock"
flock 9  # one builder at a time (parallel test sessions)

# rebuild when the recipe changed or the venv's python no longer starts (base interpreter gone)
if [ "$(cat "$MARKER" 2>/dev/null)" != "$RECIPE" ] || ! "$VENV/bin/python" -c "" 2>/dev/null; then
    [ "${GANLET_NO_BUILD:-0}" = 1 ] && die "$VENV is not built (GANLET_NO_BUILD=1); run $0"
    if [ -n "$(ls -A "$VENV" 2>/dev/null)" ] && [ ! -e "$MARKER" ] && [ ! -e "$VENV/pyvenv.cfg" ]; then
        die "$VENV is not empty and is not a venv; pass another folder"
    fi
    PY39="$(find_python39)"
    rm -rf "$VENV"
    "$PY39" -m venv "$VENV" || die "$PY39 -m venv failed"
    # wheels only: an sdist of numpy 1.19 would try to compile for minutes and fail
    "$VENV/bin/python" -m pip install -q --disable-pip-version-check --only-binary=:all: \
        "${REQUIREMENTS[@]}" >&2 || die "pip install ${REQUIREMENTS[*]} failed (no network to PyPI?)"
    echo "$RECIPE" >"$MARKER"
fi
"$VENV/bin/python" "$SMOKE" || die "$VENV/bin/python cannot import numpy"
