#!/usr/bin/env bash
# The project installed the way users install it: a wheel, in a fresh virtual environment, not
# editable. Then the commands that need package data: `ganlet budgets` (board profiles),
# `ganlet train` + `ganlet compile` on a tiny invented series (no --board: the default
# profile), `python -m ganlet`, and the bundle's `run.py check`. Exits non-zero on any failure.
set -euo pipefail
trap 'echo "wheel check: FAILED (exit $?) at line $LINENO: $BASH_COMMAND" >&2' ERR
cd "$(dirname "$0")/.."
work=$(mktemp -d "${TMPDIR:-/tmp}/ganlet-wheel-XXXXXX")
trap 'rm -rf "$work"' EXIT
python3 -m pip wheel --no-deps --quiet -w "$work/dist" .
wheel=$(ls "$work"/dist/ganlet-*.whl)
python3 -m venv "$work/venv"
# shellcheck disable=SC1091
. "$work/venv/bin/activate"
pip install --quiet "${wheel}[compile]"
cd "$work"
# output captured first: in `cmd | grep -q` grep exits at its first match, a click command still
# writing then exits 1 without a word (EPIPE), and pipefail failed this check at random (one CI
# run of stop 17)
budgets=$(ganlet budgets)
grep -q "a53-512" <<<"$budgets"
python -m ganlet --version
python - <<'PY'
import numpy as np, pandas as pd
t = pd.date_range("2026-01-05", periods=600, freq="60s")
x = np.sin(np.arange(600) / 9.0)
rng = np.random.default_rng(0)
pd.DataFrame({"time": t, "flow": 10 + x + 0.05 * rng.standard_normal(600),
              "power": 5 + 0.5 * x + 0.05 * rng.standard_normal(600)}).to_csv("data.csv", index=False)
PY
ganlet train data.csv --out model --window 8 --adversarial-epochs 1 --inversion-epochs 2 --quiet
ganlet compile model --out bundle --distil-epochs 1 --quiet
checked=$(python3 -I -B bundle/run.py check)
grep -q "bundle OK" <<<"$checked"
echo "wheel check: $(basename "$wheel") installs, budgets, train, compile and run.py check work"
