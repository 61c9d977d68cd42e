#!/usr/bin/env bash
# Runs the Slurm recipe on a one-node Slurm cluster started on this machine, and checks
# that the merged result is bit for bit the single run's.
#
#   deploy/slurm/test-local.sh [PATHFOLD_BINARY]
#
# Installs Debian's slurm-wlm and munge when missing (needs root and the package
# registry), starts munged, slurmctld and slurmd with a private configuration, state and
# ports under $PATHFOLD_SLURM_DIR (default /tmp/pathfold-slurm), submits the job array
# and its dependent merge step with submit.sh as a user would, waits for them, compares,
# and stops the daemons it started. Safe to run again: it stops what a previous run left.
#
# Exit status: 0 passed, 1 failed, 77 skipped (Slurm cannot be installed here: the
# reason is printed). Quiet unless something goes wrong; logs stay in the state folder.
set -uo pipefail
repo=$(cd "$(dirname "$0")/../.." && pwd)
bin=${1:-${PATHFOLD:-$repo/target/release/pathfold}}
dir=${PATHFOLD_SLURM_DIR:-/tmp/pathfold-slurm}
payoff=payoffs/worst_of_autocall.payoff
paths=160000 seed=11 parts=16

fail() { echo "slurm test: FAILED: $*" >&2; exit 1; }
skip() { echo "slurm test: SKIPPED: $*" >&2; exit 77; }

[ -x "$bin" ] || fail "no pathfold binary at $bin (build it with cargo build --release, or pass its path)"
bin=$(cd "$(dirname "$bin")" && pwd)/$(basename "$bin")

# 1. Slurm and munge, from Debian's packages.
if ! command -v slurmctld >/dev/null || ! command -v slurmd >/dev/null || ! command -v munged >/dev/null; then
    [ "$(id -u)" = 0 ] || skip "slurm-wlm and munge are not installed and this is not root: cannot install them"
    command -v apt-get >/dev/null || skip "slurm-wlm and munge are not installed and there is no apt-get"
    if ! timeout 300 apt-get update -qq >"$dir.apt.log" 2>&1 ||
        ! DEBIAN_FRONTEND=noninteractive timeout 600 apt-get install -y -qq slurm-wlm munge >>"$dir.apt.log" 2>&1; then
        skip "could not install slurm-wlm and munge: the Debian package registry is unreachable or refused (see $dir.apt.log)"
    fi
fi
[ "$(id -u)" = 0 ] || skip "starting slurmd needs root"

# 2. A private one-node cluster: stop what a previous run left, then start afresh.
stop() {
    for d in slurmd slurmctld munged; do
        local pidfile=$dir/$d.pid pid
        pid=$(cat "$pidfile" 2>/dev/null)
        # Only a daemon this script started: the pid file's process must be that daemon.
        if [ -n "$pid" ] && [ "$(cat "/proc/$pid/comm" 2>/dev/null)" = "$d" ]; then
            kill "$pid" 2>/dev/null
            for _ in $(seq 50); do kill -0 "$pid" 2>/dev/null || break; sleep 0.1; done
        fi
        rm -f "$pidfile"
    done
}
stop
rm -rf "$dir/state" "$dir/spool" "$dir/run"
mkdir -p "$dir/state" "$dir/spool" "$dir/munge" "$dir/run"
chmod 700 "$dir/munge"
[ -s "$dir/munge/munge.key" ] || dd if=/dev/urandom of="$dir/munge/munge.key" bs=1024 count=1 status=none
chmod 400 "$dir/munge/munge.key"
host=$(hostname -s)
cpus=$(nproc)
cat >"$dir/slurm.conf" <<CONF
ClusterName=pathfoldtest
SlurmctldHost=$host(127.0.0.1)
SlurmctldPort=16817
SlurmdPort=16818
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
CredType=cred/munge
AuthInfo=socket=$dir/munge/munge.socket
StateSaveLocation=$dir/state
SlurmdSpoolDir=$dir/spool
SlurmctldPidFile=$dir/slurmctld.pid
SlurmdPidFile=$dir/slurmd.pid
SlurmctldLogFile=$dir/slurmctld.log
SlurmdLogFile=$dir/slurmd.log
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
SelectType=select/cons_tres
SelectTypeParameters=CR_Core
ReturnToService=2
MpiDefault=none
JobCompType=jobcomp/none
AccountingStorageType=accounting_storage/none
SchedulerType=sched/backfill
MaxArraySize=1001
NodeName=$host NodeAddr=127.0.0.1 CPUs=$cpus State=UNKNOWN
PartitionName=test Nodes=$host Default=YES MaxTime=30 State=UP
CONF
export SLURM_CONF=$dir/slurm.conf
trap stop EXIT
munged --socket="$dir/munge/munge.socket" --key-file="$dir/munge/munge.key" --pid-file="$dir/munged.pid" \
    --log-file="$dir/munged.log" --seed-file="$dir/munge/munge.seed" --force ||
    fail "munged did not start (see $dir/munged.log)"
slurmctld -f "$SLURM_CONF" || fail "slurmctld did not start (see $dir/slurmctld.log)"
slurmd -f "$SLURM_CONF" || fail "slurmd did not start (see $dir/slurmd.log)"
for _ in $(seq 100); do
    sinfo -h -o %t 2>/dev/null | grep -qE '^(idle|mix|alloc)' && break
    sleep 0.2
done
sinfo -h -o %t 2>/dev/null | grep -qE '^(idle|mix|alloc)' ||
    fail "the node did not come up: $(sinfo -h 2>&1 | head -1) (see $dir/slurmd.log, $dir/slurmctld.log)"

# 3. Submit as a user would, wait for the merge step.
out=$dir/run
cd "$repo" || fail "no repository at $repo"
merge=$(PAYOFF=$payoff PATHS=$paths SEED=$seed PARTS=$parts OUT=$out PATHFOLD=$bin \
    deploy/slurm/submit.sh 2>"$dir/submit.log") || fail "sbatch refused the jobs: $(cat "$dir/submit.log")"
state=
for _ in $(seq 900); do
    state=$(scontrol show job "$merge" 2>/dev/null | grep -o 'JobState=[A-Z_]*' | cut -d= -f2)
    case $state in COMPLETED | FAILED | CANCELLED | TIMEOUT | NODE_FAIL | OUT_OF_MEMORY) break ;; esac
    sleep 0.2
done
[ "$state" = COMPLETED ] || fail "the merge job ended $state: $(cat "$out"/*.log 2>/dev/null | tail -5)"
[ "$(ls "$out"/part-*.json | wc -l)" = "$parts" ] || fail "expected $parts parts in $out"

# 4. The reference: the single run, bit for bit (JSON prints the shortest digits that
# read back to the same double; only the time taken may differ).
"$bin" price "$payoff" --paths "$paths" --seed "$seed" --format json >"$dir/single.json" ||
    fail "the single run failed"
if ! diff <(grep -v '"elapsed_seconds"' "$dir/single.json") <(grep -v '"elapsed_seconds"' "$out/result.json") \
    >"$dir/diff.txt"; then
    fail "the merged result differs from the single run: $(head -20 "$dir/diff.txt")"
fi
echo "slurm test: passed ($parts array tasks and a dependent merge on a one-node Slurm $(sinfo -V | cut -d' ' -f2); the merge equals the single run bit for bit)"
