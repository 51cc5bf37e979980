#!/usr/bin/env bash
# Cluster smoke test: starts a throwaway single-node Slurm (with its own munge)
# on this machine, runs `tapmap apply --shard auto` over sample_data as a 4-task
# job array, merges the shards and checks the merged tables, and every map, are
# byte-identical to one unsharded run.
#
# Run as root after `cargo build --release` (CI: `bash scripts/cluster-smoke.sh`).
# Installs slurm-wlm and munge if missing. Everything it writes lives in one
# private mktemp folder (removed on success, kept and named on failure); every
# daemon it starts listens on 127.0.0.1 only and is stopped on exit.
set -euo pipefail
cd "$(dirname "$0")/.."
REPO=$(pwd -P)
TAPMAP=$REPO/target/release/tapmap
RECIPE=kernels/line-a-edges.recipe.toml
INPUT=sample_data
TASKS=4
NODE=smoke1                      # Slurm node name, passed to slurmd with -N
export PATH=$PATH:/usr/sbin:/sbin # the daemons and mungekey live in sbin
T0=$SECONDS

die() { echo "cluster-smoke: FAIL: $*" >&2; exit 1; }
step() { echo "== $*"; }

[ "$(id -u)" = 0 ] || die "run as root: it installs packages and starts daemons as root and munge"
[ -x "$TAPMAP" ] || die "$TAPMAP missing: run cargo build --release first"
[ -f "$RECIPE" ] || die "$RECIPE missing in $REPO"
[ -d "$INPUT" ] || die "$INPUT/ missing in $REPO"

# --- packages -----------------------------------------------------------------
step "packages"
if command -v slurmctld >/dev/null && command -v munged >/dev/null; then
  echo "slurmctld and munged already installed"
else
  export DEBIAN_FRONTEND=noninteractive
  if ! apt-get install -y --no-install-recommends slurm-wlm munge; then
    echo "install failed with the current package lists; running apt-get update and retrying"
    apt-get update || die "apt-get update failed"
    apt-get install -y --no-install-recommends slurm-wlm munge || die "apt-get install slurm-wlm munge failed"
  fi
fi
for tool in mungekey munged munge unmunge slurmctld slurmd sinfo sbatch squeue scancel scontrol runuser; do
  command -v "$tool" >/dev/null || die "$tool not found on PATH after the install"
done
id munge >/dev/null 2>&1 || die "no 'munge' user (the munge package creates it)"

# --- private folder, and the exit trap that stops every daemon ----------------
PRIV=$(mktemp -d /tmp/tapmap-cluster-smoke.XXXXXX)
chmod 0755 "$PRIV"               # munge must be able to reach its sub-folders
MUNGE_DIR=$PRIV/munge            # key, seed, log (munge's own, mode 0700)
MUNGE_RUN=$PRIV/munge-run        # socket and pid (mode 0755: clients connect)
MUNGE_SOCKET=$MUNGE_RUN/munge.socket
SL=$PRIV/slurm                   # slurm.conf, logs, pid files
OUT=$PRIV/out                    # tapmap results and per-task exit codes
JOBS=$PRIV/jobs                  # batch script and task output files
mkdir -p "$MUNGE_DIR" "$MUNGE_RUN" "$SL/state" "$SL/spool" "$OUT" "$JOBS"
chown munge:munge "$MUNGE_DIR" "$MUNGE_RUN"
chmod 0700 "$MUNGE_DIR"
chmod 0755 "$MUNGE_RUN"
export SLURM_CONF=$SL/slurm.conf
JOBID=

# Stops the process named in a pid file, if it is still the daemon we started
# (checked by its command name, so a recycled pid is never signalled).
stop_pidfile() {
  local file=$1 name=$2 pid i
  [ -s "$file" ] || return 0
  pid=$(tr -dc 0-9 <"$file")
  [ -n "$pid" ] && [ "$(cat "/proc/$pid/comm" 2>/dev/null)" = "$name" ] || return 0
  kill -TERM "$pid" 2>/dev/null || return 0
  for i in $(seq 50); do
    [ -d "/proc/$pid" ] || return 0
    sleep 0.2
  done
  echo "cluster-smoke: $name (pid $pid) ignored SIGTERM for 10 s; sending SIGKILL" >&2
  kill -KILL "$pid" 2>/dev/null || true
}

# Waits up to $2 seconds for the daemon of pid file $1 to exit on its own.
wait_pidfile() {
  local file=$1 secs=$2 pid i
  [ -s "$file" ] || return 0
  pid=$(tr -dc 0-9 <"$file")
  for i in $(seq $((secs * 5))); do
    [ -n "$pid" ] && [ -d "/proc/$pid" ] || return 0
    sleep 0.2
  done
}

cleanup() {
  local rc=$?
  set +e
  trap - EXIT
  if [ -n "$JOBID" ]; then       # a job still queued or running is cancelled
    scancel "$JOBID" 2>/dev/null
    for _ in $(seq 20); do
      [ -z "$(squeue -h -j "$JOBID" -o %i 2>/dev/null)" ] && break
      sleep 1
    done
  fi
  if [ -s "$SL/slurmctld.pid" ]; then
    scontrol shutdown >/dev/null 2>&1   # stops slurmctld and slurmd
    wait_pidfile "$SL/slurmctld.pid" 10
    wait_pidfile "$SL/slurmd.pid" 10
  fi
  stop_pidfile "$SL/slurmctld.pid" slurmctld
  stop_pidfile "$SL/slurmd.pid" slurmd
  stop_pidfile "$MUNGE_RUN/munged.pid" munged
  if [ "$rc" -ne 0 ]; then
    for log in "$MUNGE_DIR/munged.log" "$SL/slurmctld.log" "$SL/slurmd.log"; do
      [ -f "$log" ] || continue
      echo "---- $log (last 60 lines)" >&2
      tail -n 60 "$log" >&2
    done
    echo "cluster-smoke: failed (exit $rc); files kept in $PRIV" >&2
  else
    rm -rf "$PRIV"
  fi
  exit "$rc"
}
trap cleanup EXIT
trap 'exit 130' INT             # a signal still runs the cleanup
trap 'exit 143' TERM
trap 'exit 129' HUP

# --- munge with a private key and socket --------------------------------------
step "munge"
runuser -u munge -- mungekey --create --keyfile="$MUNGE_DIR/munge.key" ||
  die "mungekey --create failed"
chmod 0600 "$MUNGE_DIR/munge.key"
runuser -u munge -- munged \
  --socket="$MUNGE_SOCKET" \
  --key-file="$MUNGE_DIR/munge.key" \
  --seed-file="$MUNGE_DIR/munged.seed" \
  --log-file="$MUNGE_DIR/munged.log" \
  --pid-file="$MUNGE_RUN/munged.pid" ||
  die "munged did not start"
munge -n -S "$MUNGE_SOCKET" | unmunge -S "$MUNGE_SOCKET" >/dev/null ||
  die "munge credential round trip through $MUNGE_SOCKET failed"
echo "munged up on $MUNGE_SOCKET"

# --- slurm.conf, slurmctld and slurmd -----------------------------------------
step "slurm"
# A port nobody listens on yet, from $1 upwards (private, so a system Slurm on
# the default ports is left alone).
free_port() {
  local p=$1
  while (exec 3<>"/dev/tcp/127.0.0.1/$p") 2>/dev/null; do p=$((p + 1)); done
  echo "$p"
}
CTLD_PORT=$(free_port 16817)
SLURMD_PORT=$(free_port $((CTLD_PORT + 1)))
CPUS=$(nproc)
cat >"$SLURM_CONF" <<EOF
# Throwaway single-node cluster of scripts/cluster-smoke.sh (loopback only).
ClusterName=tapmap-smoke
SlurmctldHost=localhost(127.0.0.1)
SlurmctldPort=$CTLD_PORT
SlurmdPort=$SLURMD_PORT
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
CredType=cred/munge
AuthInfo=socket=$MUNGE_SOCKET
CommunicationParameters=NoInAddrAny,NoCtldInAddrAny
StateSaveLocation=$SL/state
SlurmdSpoolDir=$SL/spool
SlurmctldPidFile=$SL/slurmctld.pid
SlurmdPidFile=$SL/slurmd.pid
SlurmctldLogFile=$SL/slurmctld.log
SlurmdLogFile=$SL/slurmd.log
SlurmctldDebug=info
SlurmdDebug=info
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
JobAcctGatherType=jobacct_gather/none
AccountingStorageType=accounting_storage/none
JobCompType=jobcomp/none
SelectType=select/cons_tres
SelectTypeParameters=CR_Core
MpiDefault=none
SwitchType=switch/none
ReturnToService=2
MailProg=/bin/true
NodeName=$NODE NodeAddr=127.0.0.1 CPUs=$CPUS State=UNKNOWN
PartitionName=smoke Nodes=$NODE Default=YES MaxTime=INFINITE State=UP
EOF
slurmctld -f "$SLURM_CONF" -i || die "slurmctld did not start"
slurmd -f "$SLURM_CONF" -N "$NODE" || die "slurmd did not start"
state=
for _ in $(seq 30); do
  state=$(sinfo -h -N -n "$NODE" -o %t 2>/dev/null || true)
  [ "$state" = idle ] && break
  sleep 1
done
[ "$state" = idle ] || die "node $NODE not idle after 30 s (sinfo state: '${state:-none}')"
echo "node $NODE idle with $CPUS CPUs; slurmctld on 127.0.0.1:$CTLD_PORT, slurmd on :$SLURMD_PORT"

# --- the job array ------------------------------------------------------------
step "job array of $TASKS tasks"
# Each task runs one shard; its exit code goes to rc-<task id>.
cat >"$JOBS/task.sh" <<EOF
#!/usr/bin/env bash
echo "task \$SLURM_ARRAY_TASK_ID (count \$SLURM_ARRAY_TASK_COUNT, min \$SLURM_ARRAY_TASK_MIN) of job \$SLURM_ARRAY_JOB_ID on \$(hostname -s) in \$PWD"
rc=0
$(printf %q "$TAPMAP") apply --recipe $(printf %q "$RECIPE") --save maps,stats,manifest \\
  --shard auto --quiet --out $(printf %q "$OUT/sharded") $(printf %q "$INPUT") || rc=\$?
echo "\$rc" >$(printf %q "$OUT")/rc-\$SLURM_ARRAY_TASK_ID
echo "exit \$rc"
exit "\$rc"
EOF
chmod 0755 "$JOBS/task.sh"
JOBID=$(sbatch --parsable --job-name=tapmap-smoke --array=0-$((TASKS - 1)) \
  --ntasks=1 --cpus-per-task=1 --chdir="$REPO" --output="$JOBS/task-%a.out" \
  "$JOBS/task.sh") || die "sbatch failed"
JOBID=${JOBID%%;*}
echo "submitted job $JOBID"
# Done when squeue lists no task of the job (an unknown job id also means done).
done_=
for _ in $(seq 300); do
  if q=$(squeue -h -j "$JOBID" -o '%i %T' 2>&1); then
    [ -z "$q" ] && { done_=1; break; }
  else
    case $q in *"Invalid job id"*) done_=1; break ;; esac
    die "squeue failed: $q"
  fi
  sleep 1
done
[ -n "$done_" ] || die "job $JOBID still queued or running after 5 minutes: ${q//$'\n'/, }"
finished=$JOBID
JOBID=                           # nothing left to cancel
for i in $(seq 0 $((TASKS - 1))); do
  echo "---- task $i output"
  cat "$JOBS/task-$i.out" 2>/dev/null || echo "(no output file)"
done
for i in $(seq 0 $((TASKS - 1))); do
  [ -f "$OUT/rc-$i" ] || die "task $i of job $finished left no exit code (did it run?)"
  rc=$(cat "$OUT/rc-$i")
  [ "$rc" = 0 ] || die "task $i of job $finished: tapmap exited $rc (see its output above)"
done
for k in $(seq 1 $TASKS); do
  [ -f "$OUT/sharded/shard-$k-of-$TASKS/images.csv" ] ||
    die "$OUT/sharded/shard-$k-of-$TASKS/images.csv missing"
done
for k in $(seq 1 $TASKS); do
  echo "shard $k: $(($(wc -l <"$OUT/sharded/shard-$k-of-$TASKS/images.csv") - 1)) images"
done
echo "all $TASKS tasks exited 0 and wrote their shard folders"

# --- merge, and compare with one unsharded run --------------------------------
step "merge and compare with one unsharded run"
"$TAPMAP" merge "$OUT/sharded" || die "tapmap merge failed"
for f in stats.csv images.csv manifest.json; do
  [ -f "$OUT/sharded/$f" ] || die "tapmap merge wrote no $f"
done
"$TAPMAP" apply --recipe "$RECIPE" --save maps,stats,manifest --quiet \
  --out "$OUT/single" "$INPUT" || die "the single (unsharded) run failed"
for f in stats.csv images.csv; do
  if ! cmp "$OUT/single/$f" "$OUT/sharded/$f"; then
    echo "---- diff single/$f merged/$f (first 40 lines)" >&2
    diff "$OUT/single/$f" "$OUT/sharded/$f" | head -n 40 >&2 || true
    die "merged $f differs from the single run's"
  fi
done
# Every map of the single run must be in exactly one shard, byte for byte.
maps=0
while IFS= read -r -d '' npy; do
  rel=${npy#"$OUT/single/maps/"}
  holders=("$OUT"/sharded/shard-*-of-"$TASKS"/maps/"$rel")
  have=()
  for h in "${holders[@]}"; do [ -f "$h" ] && have+=("$h"); done
  [ "${#have[@]}" -eq 1 ] || die "maps/$rel is in ${#have[@]} shard folders, not exactly 1"
  cmp "$npy" "${have[0]}" || die "maps/$rel differs between the single run and ${have[0]#"$OUT/"}"
  maps=$((maps + 1))
done < <(find "$OUT/single/maps" -name '*.npy' -print0 | sort -z)
[ "$maps" -gt 0 ] || die "the single run wrote no maps"
sharded_maps=$(find "$OUT"/sharded/shard-*-of-"$TASKS" -path '*/maps/*' -name '*.npy' | wc -l)
[ "$sharded_maps" -eq "$maps" ] || die "the shards hold $sharded_maps maps, the single run $maps"
images=$(($(wc -l <"$OUT/single/images.csv") - 1))

echo "PASS: $images images in $TASKS Slurm array tasks (job $finished); merged stats.csv and" \
  "images.csv identical to one run, $maps maps identical; $((SECONDS - T0)) s"
