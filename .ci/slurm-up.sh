#!/usr/bin/env bash
# Start a one-node SLURM cluster on this machine (as root) for the tests that submit real
# jobs through dask-jobqueue. Debian's slurm-wlm 22.05 and munge; every daemon runs as
# root with no cgroup enforcement (proctrack/linuxproc, task/none): a CI sandbox, not a
# production setup. State lives under $SLURM_CI_DIR (default /tmp/snaplift-slurm) so that
# .ci/slurm-down.sh can remove it. Each step is bounded by a timeout: a setup that cannot
# come up fails within about two minutes instead of hanging CI.
set -euo pipefail
DIR="${SLURM_CI_DIR:-/tmp/snaplift-slurm}"
HOST="$(hostname -s)"
CPUS="$(nproc)"
# leave 1 GiB for the system; RealMemory is in MiB
MEMORY="$(( $(awk '/MemTotal/ {print $2}' /proc/meminfo) / 1024 - 1024 ))"

if ! command -v sbatch >/dev/null || ! command -v munged >/dev/null; then
    export DEBIAN_FRONTEND=noninteractive
    timeout 600 apt-get update -qq
    timeout 900 apt-get install -y -qq --no-install-recommends slurm-wlm munge >/dev/null
fi

mkdir -p "$DIR"/{state,spool,log} /etc/slurm /etc/munge /run/munge /var/log/munge /var/lib/munge
if [ ! -s /etc/munge/munge.key ]; then
    dd if=/dev/urandom of=/etc/munge/munge.key bs=1024 count=1 status=none
fi
chown -R munge:munge /etc/munge /run/munge /var/log/munge /var/lib/munge 2>/dev/null || true
chmod 0700 /etc/munge; chmod 0400 /etc/munge/munge.key
if ! timeout 10 munge -n >/dev/null 2>&1; then
    # --force: a container may keep /run/munge (and a stale socket) from an earlier start
    timeout 30 runuser -u munge -- /usr/sbin/munged --force
fi
timeout 10 munge -n | timeout 10 unmunge >/dev/null

cat > /etc/slurm/slurm.conf <<CONF
ClusterName=snaplift-ci
SlurmctldHost=${HOST}
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
CredType=cred/munge
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
JobAcctGatherType=jobacct_gather/none
AccountingStorageType=accounting_storage/none
SchedulerType=sched/backfill
SelectType=select/cons_tres
SelectTypeParameters=CR_Core_Memory
ReturnToService=2
MpiDefault=none
StateSaveLocation=${DIR}/state
SlurmdSpoolDir=${DIR}/spool
SlurmctldPidFile=${DIR}/slurmctld.pid
SlurmdPidFile=${DIR}/slurmd.pid
SlurmctldLogFile=${DIR}/log/slurmctld.log
SlurmdLogFile=${DIR}/log/slurmd.log
SlurmctldTimeout=30
SlurmdTimeout=30
InactiveLimit=0
KillWait=10
MinJobAge=30
NodeName=${HOST} CPUs=${CPUS} RealMemory=${MEMORY} State=UNKNOWN
PartitionName=debug Nodes=${HOST} Default=YES MaxTime=INFINITE State=UP OverSubscribe=YES
CONF
cat > /etc/slurm/cgroup.conf <<CONF
CgroupPlugin=cgroup/v1
ConstrainCores=no
ConstrainRAMSpace=no
ConstrainDevices=no
ConstrainSwapSpace=no
CONF

# stop daemons of an earlier start (only if the pid file still names that daemon) and
# forget their state: every CI run starts from an empty queue
stop_daemon() {
    local pid
    pid="$(cat "$DIR/$1.pid" 2>/dev/null || true)"
    if [ -n "$pid" ] && [ "$(cat "/proc/$pid/comm" 2>/dev/null)" = "$1" ]; then
        kill "$pid" 2>/dev/null || true
        sleep 1
    fi
}
stop_daemon slurmctld; stop_daemon slurmd
rm -rf "$DIR/state" "$DIR/spool"; mkdir -p "$DIR/state" "$DIR/spool"
/usr/sbin/slurmctld -i
/usr/sbin/slurmd
for _ in $(seq 1 60); do
    if timeout 5 sinfo -h -N -o '%T' 2>/dev/null | grep -Eq '^(idle|mixed|allocated)'; then
        break
    fi
    sleep 1
done
if ! timeout 5 sinfo -h -N -o '%T' | grep -Eq '^(idle|mixed|allocated)'; then
    timeout 5 scontrol update nodename="$HOST" state=resume 2>/dev/null || true
    sleep 2
fi
timeout 5 sinfo
# one real job end to end, bounded, so a broken setup is reported here and not in a test
timeout 60 srun --time=1 -N1 -n1 hostname >/dev/null
echo "slurm-up: one-node cluster '${HOST}' with ${CPUS} CPUs and ${MEMORY} MiB is up"
