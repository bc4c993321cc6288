#!/usr/bin/env bash
# Stop the daemons .ci/slurm-up.sh started and remove their state. Safe to call twice.
DIR="${SLURM_CI_DIR:-/tmp/snaplift-slurm}"
timeout 10 scancel --user=root 2>/dev/null || true
# only pids whose process is still the daemon named (a pid file may outlive its process)
stop() {
    local pid="$1" name="$2"
    if [ -n "$pid" ] && [ "$(cat "/proc/$pid/comm" 2>/dev/null)" = "$name" ]; then
        kill "$pid" 2>/dev/null || true
    fi
}
stop "$(cat "$DIR/slurmd.pid" 2>/dev/null)" slurmd
stop "$(cat "$DIR/slurmctld.pid" 2>/dev/null)" slurmctld
stop "$(cat /run/munge/munged.pid 2>/dev/null)" munged
sleep 1
rm -rf "$DIR"
echo "slurm-down: daemons stopped"
