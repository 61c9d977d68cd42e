#!/usr/bin/env bash
# Validates parts.yaml and merge.yaml against the Kubernetes API schema (strict: unknown
# fields are errors) with kubernetes-validate from PyPI, installed in a private virtual
# environment (default /tmp/pathfold-kubernetes-validate) on first use.
# Exit status: 0 valid, 1 invalid, 77 skipped (the validator cannot be installed here).
set -uo pipefail
here=$(cd "$(dirname "$0")" && pwd)
venv=${PATHFOLD_KV_VENV:-/tmp/pathfold-kubernetes-validate}
if [ ! -x "$venv/bin/kubernetes-validate" ]; then
    rm -rf "$venv"
    if ! python3 -m venv "$venv" >/dev/null 2>&1 ||
        ! timeout 300 "$venv/bin/pip" install -q kubernetes-validate >"$venv.log" 2>&1; then
        echo "kubernetes manifests: SKIPPED: could not install kubernetes-validate (python3 venv or PyPI unreachable; see $venv.log)" >&2
        exit 77
    fi
fi
if "$venv/bin/kubernetes-validate" --strict --quiet "$here/parts.yaml" "$here/merge.yaml"; then
    echo "kubernetes manifests: valid (kubernetes-validate $("$venv/bin/kubernetes-validate" --version 2>/dev/null | head -1), strict)"
else
    echo "kubernetes manifests: INVALID" >&2
    exit 1
fi
