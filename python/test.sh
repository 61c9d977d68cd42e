#!/usr/bin/env bash
# Installs the Python package into a private virtual environment (default
# /tmp/pathfold-python-venv) with `pip install ./python`, as a user would, and runs its
# pytest suite from the repository root against the pathfold binary PATHFOLD_BIN
# (default target/debug/pathfold, which cargo test builds).
# Exit status: 0 passed, 1 failed, 77 skipped (python3 -m venv or PyPI unavailable: the
# reason is printed).
set -uo pipefail
repo=$(cd "$(dirname "$0")/.." && pwd)
venv=${PATHFOLD_PY_VENV:-/tmp/pathfold-python-venv}
cd "$repo" || exit 1
export PATHFOLD_BIN=${PATHFOLD_BIN:-$repo/target/debug/pathfold}
# Share cargo's build folder with the rest of the repository (a second build is minutes).
export CARGO_TARGET_DIR=${CARGO_TARGET_DIR:-$repo/target}
if [ ! -x "$venv/bin/pytest" ]; then
    rm -rf "$venv"
    python3 -m venv "$venv" >/dev/null 2>&1 || { echo "python: SKIPPED: python3 -m venv does not work here" >&2; exit 77; }
    timeout 300 "$venv/bin/pip" install -q pytest >"$venv.log" 2>&1 ||
        { echo "python: SKIPPED: cannot install pytest from PyPI (see $venv.log)" >&2; exit 77; }
fi
if ! timeout 1500 "$venv/bin/pip" install -q --force-reinstall --no-deps ./python >"$venv.build.log" 2>&1; then
    if grep -qiE "could not find a version|connection|temporary failure|network is unreachable" "$venv.build.log"; then
        echo "python: SKIPPED: cannot fetch maturin from PyPI to build the package (see $venv.build.log)" >&2
        exit 77
    fi
    echo "python: FAILED: pip install ./python failed:" >&2
    tail -30 "$venv.build.log" >&2
    exit 1
fi
"$venv/bin/python" -m pytest -q -p no:cacheprovider python/tests
