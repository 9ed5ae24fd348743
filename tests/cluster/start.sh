#!/usr/bin/env bash
# Start a single-node SLURM cluster on localhost for the integration test:
#   tests/cluster/start.sh STATE_DIR
# Installs Debian's slurmctld, slurmd, slurm-client and munge when they are missing (root only),
# writes slurm.conf into STATE_DIR and links it as /etc/slurm/slurm.conf (the executor's job step
# drops SLURM_CONF from the environment of its inner srun, so only the default path works; a
# slurm.conf there that this script did not write is left alone and the script gives up), and
# starts munged (unless one already answers), slurmctld and slurmd in their foreground modes in
# the background. Their PIDs go to STATE_DIR/pids ("name pid" lines) so that tests/cluster/stop.sh
# stops exactly those. Clients find the cluster with: . STATE_DIR/env   (exports SLURM_CONF)
# Exit status 77: this machine cannot run the cluster (not root, packages cannot be installed);
# the reason is the last line on stderr.
set -euo pipefail

CANNOT=77
MARKER="# Written by tests/cluster/start.sh"
SYSTEM_CONF=/etc/slurm/slurm.conf
STATE_DIR=${1:?usage: start.sh STATE_DIR}
mkdir -p "$STATE_DIR"
STATE_DIR=$(cd "$STATE_DIR" && pwd)
PACKAGES=(slurmctld slurmd slurm-client munge)
# Ports away from SLURM's defaults (6817/6818) so a real installation on the machine is not hit.
CTLD_PORT=${RINGID_TEST_SLURMCTLD_PORT:-16817}
SLURMD_PORT=${RINGID_TEST_SLURMD_PORT:-16818}

cannot() {
    echo "start.sh: $*" >&2
    exit "$CANNOT"
}

have_binaries() {
    command -v slurmctld && command -v slurmd && command -v sbatch && command -v munged
} >/dev/null 2>&1

if ! have_binaries; then
    [ "$(id -u)" -eq 0 ] || cannot "SLURM or munge is not installed and installing it needs root"
    command -v apt-get >/dev/null 2>&1 || cannot "SLURM or munge is not installed and there is no apt-get"
    echo "start.sh: installing ${PACKAGES[*]}" >&2
    if ! { apt-get update -qq && DEBIAN_FRONTEND=noninteractive \
        apt-get install -y -qq --no-install-recommends "${PACKAGES[@]}"; } >"$STATE_DIR/apt.log" 2>&1; then
        cannot "apt-get install ${PACKAGES[*]} failed (see $STATE_DIR/apt.log)"
    fi
    have_binaries || cannot "${PACKAGES[*]} installed but the daemons are still not on PATH"
fi
[ "$(id -u)" -eq 0 ] || cannot "the local cluster runs slurmd as root (SlurmUser=root); not root"

: >"$STATE_DIR/pids"
mkdir -p "$STATE_DIR"/{ctld,slurmd,log}

# The cluster must not be left half started: stop what this script started if a step fails.
on_error() {
    echo "start.sh: failed; stopping what was started (logs in $STATE_DIR/log)" >&2
    "$(dirname "$0")/stop.sh" "$STATE_DIR" >&2 || true
}
trap on_error ERR

start_daemon() { # name, command...: foreground daemon in the background, PID recorded
    local name=$1
    shift
    setsid "$@" </dev/null >"$STATE_DIR/log/$name.out" 2>&1 &
    echo "$name $!" >>"$STATE_DIR/pids"
}

wait_for() { # seconds, description, command...
    local seconds=$1 what=$2
    shift 2
    local deadline=$((SECONDS + seconds))
    until "$@" >/dev/null 2>&1; do
        if [ "$SECONDS" -ge "$deadline" ]; then
            echo "start.sh: $what did not happen within ${seconds}s" >&2
            return 1
        fi
        sleep 0.2
    done
}

# munge: SLURM's authentication. Reuse a munged that already answers (it is not ours to stop).
if munge -n </dev/null 2>/dev/null | unmunge >/dev/null 2>&1; then
    echo "start.sh: using the munged already running" >&2
else
    [ -s /etc/munge/munge.key ] || cannot "/etc/munge/munge.key is missing (the munge package creates it)"
    install -d -o munge -g munge -m 0755 /run/munge
    start_daemon munged setpriv --reuid=munge --regid=munge --init-groups munged --foreground
    wait_for 15 "munged answering" sh -c 'munge -n </dev/null | unmunge'
fi

# slurm.conf: the node as slurmd sees it, with RealMemory lowered to 95 % (a node reporting less
# memory than configured is drained).
node_line=$(slurmd -C | head -n 1)
node_name=$(sed -n 's/^NodeName=\([^ ]*\).*/\1/p' <<<"$node_line")
real_mb=$(sed -n 's/.*RealMemory=\([0-9]*\).*/\1/p' <<<"$node_line")
cpus=$(sed -n 's/.* CPUs=\([0-9]*\).*/\1/p' <<<"$node_line")
usable_mb=$((real_mb * 95 / 100))
node_line=${node_line/RealMemory=$real_mb/RealMemory=$usable_mb}
def_mem_per_cpu=$((usable_mb / cpus))
[ "$def_mem_per_cpu" -le 2000 ] || def_mem_per_cpu=2000

cat >"$STATE_DIR/slurm.conf" <<EOF
$MARKER: a single-node test cluster on localhost.
ClusterName=ringidtest
SlurmctldHost=$(hostname -s)(127.0.0.1)
SlurmctldPort=$CTLD_PORT
SlurmdPort=$SLURMD_PORT
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
StateSaveLocation=$STATE_DIR/ctld
SlurmdSpoolDir=$STATE_DIR/slurmd
SlurmctldPidFile=$STATE_DIR/slurmctld.pid
SlurmdPidFile=$STATE_DIR/slurmd.pid
SlurmctldLogFile=$STATE_DIR/log/slurmctld.log
SlurmdLogFile=$STATE_DIR/log/slurmd.log
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
MpiDefault=none
ReturnToService=2
SchedulerType=sched/backfill
SchedulerParameters=batch_sched_delay=0
SelectType=select/cons_tres
SelectTypeParameters=CR_Core_Memory
AccountingStorageType=accounting_storage/none
JobAcctGatherType=jobacct_gather/none
JobCompType=jobcomp/none
# Finished jobs stay visible to squeue/scontrol this long (s); the executor's squeue status
# command needs at least 3 x its first status-check delay.
MinJobAge=300
$node_line NodeAddr=127.0.0.1 State=UNKNOWN
PartitionName=debug Nodes=$node_name Default=YES MaxTime=INFINITE State=UP DefMemPerCPU=$def_mem_per_cpu
EOF

if [ -e "$SYSTEM_CONF" ] || [ -L "$SYSTEM_CONF" ]; then
    if ! grep -q "^$MARKER" "$SYSTEM_CONF" 2>/dev/null; then
        cannot "$SYSTEM_CONF exists and was not written by this script; not replacing a real cluster's configuration"
    fi
    rm -f "$SYSTEM_CONF" # a test cluster's, left by a run that was killed
fi
mkdir -p "$(dirname "$SYSTEM_CONF")"
ln -s "$STATE_DIR/slurm.conf" "$SYSTEM_CONF"
echo "conf $SYSTEM_CONF" >>"$STATE_DIR/pids"
echo "export SLURM_CONF=$SYSTEM_CONF" >"$STATE_DIR/env"
export SLURM_CONF=$SYSTEM_CONF

start_daemon slurmctld slurmctld -D -c -f "$SLURM_CONF"
wait_for 20 "slurmctld answering" scontrol ping
start_daemon slurmd slurmd -D -f "$SLURM_CONF"
wait_for 30 "node $node_name idle" sh -c "sinfo -h -n '$node_name' -o %T | grep -qx idle"

trap - ERR
echo "start.sh: SLURM up on $node_name ($cpus CPUs, ${usable_mb} MB); . $STATE_DIR/env" >&2
