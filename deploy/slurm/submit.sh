#!/usr/bin/env bash
# Submits N parts of one payoff as a Slurm job array, and the merge step after them.
#   PAYOFF=payoffs/worst_of_autocall.payoff PATHS=10000000 SEED=1 PARTS=16 OUT=run1 \
#       deploy/slurm/submit.sh
# Prints the merge job's id; the result is $OUT/result.json once it has run.
# Extra arguments go to both sbatch calls (e.g. --partition=batch).
set -euo pipefail
here=$(cd "$(dirname "$0")" && pwd)
: "${PAYOFF:?set PAYOFF}" "${PARTS:?set PARTS}" "${OUT:?set OUT}"
export PAYOFF OUT PATHS=${PATHS:-200000} SEED=${SEED:-1} PATHFOLD=${PATHFOLD:-pathfold}
mkdir -p "$OUT"
rm -f "$OUT"/part-*.json "$OUT/result.json"
array=$(sbatch --parsable "$@" --array="1-$PARTS" --output="$OUT/part-%a.log" --export=ALL "$here/part.sbatch")
sbatch --parsable "$@" --dependency="afterok:${array%%;*}" --kill-on-invalid-dep=yes \
    --output="$OUT/merge.log" --export=ALL "$here/merge.sbatch"
