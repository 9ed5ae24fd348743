#!/usr/bin/env bash
# Stop the cluster that tests/cluster/start.sh started:   tests/cluster/stop.sh STATE_DIR
# Cancels every job left on that cluster first (job processes outlive slurmd), then stops exactly
# the daemons listed in STATE_DIR/pids, newest first: SIGTERM, then SIGKILL after 10 s.
# A PID is signalled only while it still runs the program it was recorded for.
set -uo pipefail

STATE_DIR=${1:?usage: stop.sh STATE_DIR}
[ -d "$STATE_DIR" ] || exit 0
STATE_DIR=$(cd "$STATE_DIR" && pwd)
PIDS_FILE=$STATE_DIR/pids
[ -f "$PIDS_FILE" ] || exit 0

running() { # pid, name: true while pid is alive and still that program
    local comm
    comm=$(cat "/proc/$1/comm" 2>/dev/null) || return 1
    [ "$comm" = "$2" ]
}

if [ -f "$STATE_DIR/slurm.conf" ] && grep -q "^slurmctld " "$PIDS_FILE"; then
    export SLURM_CONF=$STATE_DIR/slurm.conf
    if timeout 10 scontrol ping >/dev/null 2>&1; then
        jobs=$(timeout 10 squeue -h -o %i 2>/dev/null || true)
        if [ -n "$jobs" ]; then
            echo "stop.sh: cancelling leftover jobs:" $jobs >&2
            # shellcheck disable=SC2086
            timeout 10 scancel $jobs || true
            for _ in $(seq 1 50); do
                [ -z "$(timeout 10 squeue -h -t all -o '%i %T' 2>/dev/null | grep -v -E ' (CANCELLED|COMPLETED|FAILED|TIMEOUT|NODE_FAIL|OUT_OF_MEMORY|PREEMPTED)$')" ] && break
                sleep 0.2
            done
        fi
    fi
fi

status=0
# Newest first: slurmd, slurmctld, the /etc/slurm/slurm.conf link, munged.
while read -r name pid; do
    [ -n "$pid" ] || continue
    if [ "$name" = conf ]; then # "conf PATH": the link start.sh made, removed while it is still ours
        [ "$(readlink "$pid")" = "$STATE_DIR/slurm.conf" ] && rm -f "$pid"
        continue
    fi
    running "$pid" "$name" || continue
    kill -TERM "$pid" 2>/dev/null
    for _ in $(seq 1 50); do
        running "$pid" "$name" || break
        sleep 0.2
    done
    if running "$pid" "$name"; then
        echo "stop.sh: $name ($pid) ignored SIGTERM; killing it" >&2
        kill -KILL "$pid" 2>/dev/null
        status=1
    fi
done < <(tac "$PIDS_FILE")
rm -f "$PIDS_FILE"
exit "$status"
