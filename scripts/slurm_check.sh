#!/usr/bin/env bash
# Runs the README's Slurm job array (examples/slurm/cohort_array.sh and cohort_merge.sh, the
# very files the README shows) on a real single-node Slurm cluster started here, and checks:
#   1. the array (3 shards) plus the merge job (--dependency=afterok) give the same scores.csv
#      as one unsharded `sinew cohort` run (compared without the wall-time column);
#   2. a shard cancelled with scancel while it runs, resubmitted alone, resumes (its finished
#      pair is not redone) and the merge again gives the same table.
#
# Needs root (it installs the Debian packages slurm-wlm and munge when they are missing) and
# python3. Everything it writes lives in one temporary folder; munged, slurmctld and slurmd run
# on 127.0.0.1 from that folder's configuration (the node's CPUs and memory as `slurmd -C`
# reports them). On exit, whatever happens, it cancels its jobs, stops the three daemons it
# started (by their process ids) and removes the folder. The installed packages stay.
# When Slurm cannot be installed or started the check FAILS with the reason; it never skips.
#
# Environment: SINEW (the sinew binary; default: build target/release/sinew),
# SLURM_CHECK_BUDGET_S (time limit of the whole check, default 300 s),
# SLURM_CHECK_PORT (slurmctld's port, default 6817; slurmd gets the next one).
set -euo pipefail

started=$SECONDS
budget=${SLURM_CHECK_BUDGET_S:-300}
deadline=$((started + budget))
repo="$(cd "$(dirname "$0")/.." && pwd)"
jobs_dir="$repo/examples/slurm"
port=${SLURM_CHECK_PORT:-6817}

say() { echo "slurm check: $*"; }
fail() {
    echo "slurm check FAILED: $*" >&2
    exit 1
}

# --- 0. The README shows exactly the job files this check submits. -------------------------
python3 - "$repo/README.md" "$jobs_dir/cohort_array.sh" "$jobs_dir/cohort_merge.sh" <<'PY' ||
import sys
readme = open(sys.argv[1], encoding="utf-8").read()
for path in sys.argv[2:]:
    text = open(path, encoding="utf-8").read()
    if "```sh\n" + text + "```\n" not in readme:
        sys.exit(f"README.md does not show {path} verbatim in a ```sh block")
PY
    fail "the README's job files and examples/slurm/ differ (see above)"

# --- 1. Slurm and munge. -----------------------------------------------------------------
missing=()
for tool in munged mungekey slurmctld slurmd sbatch squeue scancel scontrol sinfo; do
    command -v "$tool" >/dev/null || missing+=("$tool")
done
if ((${#missing[@]})); then
    say "installing slurm-wlm and munge (missing: ${missing[*]})"
    [[ $(id -u) == 0 ]] || fail "Slurm is not installed and this is not root: cannot apt-get install slurm-wlm munge"
    apt-get update -qq >/dev/null || fail "apt-get update failed: cannot install slurm-wlm munge"
    DEBIAN_FRONTEND=noninteractive apt-get install -y -qq --no-install-recommends slurm-wlm munge >/dev/null ||
        fail "apt-get install slurm-wlm munge failed"
fi
[[ $(id -u) == 0 ]] || fail "slurmd must run as root to start jobs (this is uid $(id -u))"

if [[ -n ${SINEW:-} ]]; then
    bin_dir="$(cd "$(dirname "$SINEW")" && pwd)"
    [[ $(basename "$SINEW") == sinew ]] || fail "SINEW=$SINEW: the job files call 'sinew'; point SINEW at a file named sinew"
else
    (cd "$repo" && cargo build --release --quiet -p sinew-cli) || fail "cargo build -p sinew-cli failed"
    bin_dir="${CARGO_TARGET_DIR:-$repo/target}/release"
fi
[[ -x $bin_dir/sinew ]] || fail "$bin_dir/sinew: not an executable"
export PATH="$bin_dir:$PATH"

# --- 2. A private cluster in a temporary folder, removed on exit. ------------------------------
work="$(mktemp -d "${TMPDIR:-/tmp}/sinew-slurm.XXXXXX")"
chmod 755 "$work" # munged wants its socket's folder (and parents) searchable by all
pids=()
# Live (not zombie) slurmstepd processes started by this check's slurmd.
our_stepds() {
    local p
    for p in $(pgrep -x slurmstepd); do
        [[ $(ps -o stat= -p "$p") == Z* ]] && continue
        tr '\0' '\n' <"/proc/$p/environ" 2>/dev/null | grep -qxF "SLURM_CONF=$work/slurm.conf" && echo "$p"
    done
    return 0
}
cleanup() {
    local status=$?
    trap - EXIT INT TERM HUP
    set +e
    if [[ -S $work/munge/socket ]] && [[ -f $work/slurm.conf ]]; then
        # Our cluster holds only our jobs: cancel them all and let slurmd end them.
        scancel --quiet --user=root 2>/dev/null
        for _ in $(seq 50); do
            [[ -z $(squeue -h -o %i 2>/dev/null) ]] && break
            sleep 0.2
        done
    fi
    # Job step daemons of our slurmd (they inherit its SLURM_CONF) must end before it does.
    for _ in $(seq 50); do
        [[ -z $(our_stepds) ]] && break
        sleep 0.2
    done
    for p in $(our_stepds); do
        echo "slurm check: slurmstepd $p still running 10 s after its jobs ended; sending SIGKILL" >&2
        kill -KILL "$p" 2>/dev/null
    done
    # Stop the daemons, the newest first: slurmd, slurmctld, munged.
    for ((i = ${#pids[@]} - 1; i >= 0; i--)); do
        kill -TERM "${pids[i]}" 2>/dev/null
        for _ in $(seq 50); do
            kill -0 "${pids[i]}" 2>/dev/null || break
            sleep 0.2
        done
        if kill -0 "${pids[i]}" 2>/dev/null; then
            echo "slurm check: process ${pids[i]} ignored SIGTERM for 10 s; sending SIGKILL" >&2
            kill -KILL "${pids[i]}" 2>/dev/null
        fi
        wait "${pids[i]}" 2>/dev/null
    done
    rm -rf "$work"
    say "took $((SECONDS - started)) s in all (budget ${budget} s); daemons stopped, $work removed"
    exit "$status"
}
trap cleanup EXIT
trap 'echo "slurm check: interrupted" >&2; exit 130' INT
trap 'echo "slurm check: interrupted" >&2; exit 143' TERM HUP

# Prints the tail of every log, for a failure's reason.
show_logs() {
    local f
    for f in "$work"/log/*; do
        [[ -f $f ]] || continue
        echo "--- $f (last 15 lines)" >&2
        tail -n 15 "$f" >&2
    done
}

# Waits until `$1` (a shell condition) holds, or fails with `$2` once the budget is spent.
wait_for() {
    until eval "$1"; do
        if ((SECONDS > deadline)); then
            show_logs
            fail "$2 (time limit ${budget} s reached)"
        fi
        sleep 0.2
    done
}

mkdir -p "$work/log" "$work/state" "$work/spool" "$work/munge" "$work/key"
chmod 700 "$work/key"
mungekey --create --keyfile="$work/key/munge.key" || fail "mungekey could not create a key"
munged --foreground --socket="$work/munge/socket" --key-file="$work/key/munge.key" \
    --pid-file="$work/munge/munged.pid" --seed-file="$work/munge/seed" \
    --log-file="$work/log/munged.log" 2>>"$work/log/munged.log" &
pids+=($!)
wait_for '[[ -S $work/munge/socket ]] || ! kill -0 ${pids[0]} 2>/dev/null' "munged did not create its socket"
[[ -S $work/munge/socket ]] || { show_logs; fail "munged could not start"; }

for p in "$port" $((port + 1)); do
    if (exec 3<>"/dev/tcp/127.0.0.1/$p") 2>/dev/null; then
        fail "port $p on 127.0.0.1 is taken (another Slurm?); set SLURM_CHECK_PORT to a free pair of ports"
    fi
done

host="$(hostname -s)"
# This machine as slurmd sees it: CPUs, sockets, cores, threads, RealMemory (MB).
node="$(slurmd -C | head -n 1)"
[[ $node == NodeName=* ]] || fail "slurmd -C did not describe this node: $node"
cpus="$(sed -n 's/.* CPUs=\([0-9]*\).*/\1/p' <<<"$node")"
cat >"$work/slurm.conf" <<EOF
# A one-node cluster on 127.0.0.1 for scripts/slurm_check.sh.
ClusterName=sinewcheck
SlurmctldHost=$host(127.0.0.1)
SlurmctldPort=$port
SlurmdPort=$((port + 1))
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
AuthInfo=socket=$work/munge/socket
CredType=cred/munge
StateSaveLocation=$work/state
SlurmdSpoolDir=$work/spool
SlurmctldPidFile=$work/slurmctld.pid
SlurmdPidFile=$work/slurmd.pid
SlurmctldLogFile=$work/log/slurmctld.log
SlurmdLogFile=$work/log/slurmd.log
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
JobAcctGatherType=jobacct_gather/none
AccountingStorageType=accounting_storage/none
MpiDefault=none
SelectType=select/cons_tres
SelectTypeParameters=CR_Core_Memory
ReturnToService=2
KillWait=5
MinJobAge=600
$node NodeAddr=127.0.0.1 State=UNKNOWN
PartitionName=check Nodes=$host Default=YES MaxTime=INFINITE State=UP
EOF
export SLURM_CONF="$work/slurm.conf"
slurmctld -D -c -f "$SLURM_CONF" >>"$work/log/slurmctld.stderr" 2>&1 &
pids+=($!)
slurmd -D -f "$SLURM_CONF" >>"$work/log/slurmd.stderr" 2>&1 &
pids+=($!)
node_state() { sinfo -h -n "$host" -o %t 2>/dev/null || true; }
wait_for '[[ $(node_state) == idle ]] || ! kill -0 ${pids[1]} 2>/dev/null || ! kill -0 ${pids[2]} 2>/dev/null' \
    "Slurm did not start: node $host never became idle"
kill -0 "${pids[1]}" 2>/dev/null || { show_logs; fail "slurmctld exited at start"; }
kill -0 "${pids[2]}" 2>/dev/null || { show_logs; fail "slurmd exited at start"; }
say "Slurm $(sinfo -V | awk '{print $2}') up on $host: $node (after $((SECONDS - started)) s)"

# --- 3. The small demo cohort and the unsharded reference table. ------------------------------
study="$work/study"
sinew demo --small --data-only --out "$study" -q
{
    for s in "$study"/*_image.nii.gz; do
        id="$(basename "$s" _image.nii.gz)"
        printf '[[subject]]\nid = "%s"\nimage = "%s_image.nii.gz"\nlabels = "%s_labels.nii.gz"\n\n' "$id" "$id" "$id"
    done
} >"$study/cohort.toml"
t0=$SECONDS
(cd "$study" && sinew cohort --manifest cohort.toml --out whole --preset default -q)
say "unsharded run (all $cpus cores): $((SECONDS - t0)) s"

# Compares two tables without their wall-time column; needs every pair of the cohort.
same_table() {
    python3 - "$1" "$2" <<'PY'
import csv, sys
def load(path):
    rows = list(csv.reader(open(path, newline="")))
    drop = rows[0].index("runtime_s")
    return [r[:drop] + r[drop + 1:] for r in rows]
got, want = load(sys.argv[1]), load(sys.argv[2])
pairs = {(r[1], r[2], r[3]) for r in want[1:]}
if len(pairs) != 6 or len(want) < 2:
    sys.exit(f"{sys.argv[2]}: expected the 6 pairs of 4 subjects, found {len(pairs)}")
if got != want:
    diff = [f"  got  {g}\n  want {w}" for g, w in zip(got, want) if g != w][:3]
    sys.exit(f"{sys.argv[1]} differs from {sys.argv[2]} ({len(got)} vs {len(want)} rows):\n" + "\n".join(diff))
print(f"{len(got) - 1} rows, {len(pairs)} pairs: equal (runtime_s left out)")
PY
}

# sbatch with this check's resources in place of the job file's (2 cores here, not 4 per task).
submit() {
    sbatch --parsable --chdir="$study" --cpus-per-task=1 --mem=1G --time=00:05:00 \
        --output="$work/log/%x_%A_%a.out" "$@" | cut -d';' -f1
}
# Job state (COMPLETED, CANCELLED, PENDING, …) of one job or array task.
job_state() { scontrol show job -o "$1" 2>/dev/null | sed -n 's/.*JobState=\([A-Z_]*\).*/\1/p' | head -n 1; }
queue_empty() { [[ -z $(squeue -h -o %i) ]]; }
expect_state() {
    local s
    s="$(job_state "$1")"
    [[ $s == "$2" ]] || { show_logs; fail "job $1 is $s, expected $2"; }
}

# --- 4. Array of 3 shards + merge (afterok): the unsharded table. ---------------------------
t0=$SECONDS
array="$(submit --array=1-3 "$jobs_dir/cohort_array.sh")"
merge="$(submit --dependency=afterok:"$array" "$jobs_dir/cohort_merge.sh")"
say "submitted array $array (3 shards) and merge $merge (afterok:$array)"
wait_for queue_empty "jobs $array and $merge did not finish"
for k in 1 2 3; do expect_state "${array}_$k" COMPLETED; done
expect_state "$merge" COMPLETED
say "array + merge: $((SECONDS - t0)) s"
same_table "$study/runs/all/scores.csv" "$study/whole/scores.csv" || fail "merged table != unsharded table"
mv "$study/runs" "$study/runs_first"

# --- 5. Cancel shard 1 while it runs, resubmit it alone: it resumes to the same table. -------
t0=$SECONDS
array="$(submit --array=1-3 "$jobs_dir/cohort_array.sh")"
merge="$(submit --dependency=afterok:"$array" "$jobs_dir/cohort_merge.sh")"
shard1="$study/runs/shard_1"
# Shard 1 of 3 holds pairs 0 and 3; cancel it once the first has finished (report.json is
# written last, atomically), while the second is being registered.
first_reports() {
    local n=0 f
    for f in "$shard1"/pairs/*/report.json; do
        [[ -e $f ]] && n=$((n + 1))
    done
    echo "$n"
}
wait_for '(( $(first_reports) >= 1 ))' "shard 1 finished no pair"
scancel "${array}_1"
wait_for '[[ $(job_state ${array}_1) == CANCELLED ]]' "shard 1 (${array}_1) was not cancelled"
wait_for '[[ -z $(squeue -h -o %i -j ${array}_1 2>/dev/null) ]]' "shard 1 (${array}_1) did not stop"
done_reports=$(first_reports)
((done_reports == 1)) && [[ ! -e $shard1/scores.shard-1-of-3.csv ]] ||
    fail "shard 1 finished before scancel reached it ($done_reports pairs done): nothing was interrupted"
report="$(echo "$shard1"/pairs/*/report.json)"
stamp="$(stat -c '%i %y' "$report")"
say "cancelled ${array}_1 after its first pair ($(basename "$(dirname "$report")")), during its second"
# The merge can never run now (afterok on a cancelled task): Slurm keeps it pending.
wait_for '[[ -z $(squeue -h -o %i -j $array 2>/dev/null) ]]' "shards 2 and 3 did not finish"
expect_state "${array}_2" COMPLETED
expect_state "${array}_3" COMPLETED
wait_for '[[ $(squeue -h -o %r -j $merge 2>/dev/null) == DependencyNeverSatisfied ]]' \
    "merge $merge is not held as DependencyNeverSatisfied after shard 1 was cancelled"
scancel "$merge"
resubmitted="$(submit --array=1 --export=ALL,SHARDS=3 "$jobs_dir/cohort_array.sh")"
merge="$(submit --dependency=afterok:"$resubmitted" "$jobs_dir/cohort_merge.sh")"
say "resubmitted shard 1 as $resubmitted (SHARDS=3) and merge $merge"
wait_for queue_empty "jobs $resubmitted and $merge did not finish"
expect_state "${resubmitted}_1" COMPLETED
expect_state "$merge" COMPLETED
[[ $(stat -c '%i %y' "$report") == "$stamp" ]] || fail "$report was rewritten: the finished pair was redone, not resumed"
(($(first_reports) == 2)) || fail "shard 1 does not hold its 2 pairs after the resubmission"
say "cancel + resubmit + merge: $((SECONDS - t0)) s"
same_table "$study/runs/all/scores.csv" "$study/whole/scores.csv" || fail "resumed merged table != unsharded table"
say "PASSED: job array, merge and resume after scancel give the unsharded table"
