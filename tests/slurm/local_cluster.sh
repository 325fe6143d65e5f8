#!/usr/bin/env bash
# A single-node SLURM cluster on this machine (Debian's slurm-wlm and munge), for proving that
# fegrid's workflow runs through snakemake-executor-plugin-slurm. Needs root. Idempotent:
#   bash tests/slurm/local_cluster.sh start    # install if needed, configure, start, wait for the node
#   bash tests/slurm/local_cluster.sh stop
set -euo pipefail
action=${1:-start}
host=$(hostname -s)

stop() {
  pkill -x slurmd 2>/dev/null || true
  pkill -x slurmctld 2>/dev/null || true
  pkill -x munged 2>/dev/null || true
}

if [ "$action" = stop ]; then stop; exit 0; fi

if ! command -v slurmctld >/dev/null || ! command -v munged >/dev/null; then
  export DEBIAN_FRONTEND=noninteractive
  apt-get update -qq
  apt-get install -y -qq --no-install-recommends slurm-wlm munge >/dev/null
fi

# munge: a key and the daemon (as the munge user)
if [ ! -s /etc/munge/munge.key ]; then
  mkdir -p /etc/munge
  dd if=/dev/urandom bs=1 count=1024 of=/etc/munge/munge.key 2>/dev/null
fi
chown munge:munge /etc/munge/munge.key && chmod 400 /etc/munge/munge.key
mkdir -p /run/munge /var/log/munge /var/lib/munge && chown munge:munge /run/munge /var/log/munge /var/lib/munge
pgrep -x munged >/dev/null || runuser -u munge -- /usr/sbin/munged

# slurm: one controller and one node on this host; squeue serves as the status command, so no
# accounting database is needed (MinJobAge keeps finished jobs visible to squeue for 10 minutes)
cpus=$(nproc)
mem_mb=$(( $(awk '/MemTotal/ {print int($2/1024)}' /proc/meminfo) - 1024 ))
mkdir -p /etc/slurm /var/spool/slurmctld /var/spool/slurmd /var/log/slurm
chown slurm:slurm /var/spool/slurmctld /var/log/slurm
cat > /etc/slurm/slurm.conf <<CONF
ClusterName=fegrid-local
SlurmctldHost=${host}
SlurmUser=slurm
AuthType=auth/munge
StateSaveLocation=/var/spool/slurmctld
SlurmdSpoolDir=/var/spool/slurmd
SlurmctldPidFile=/run/slurmctld.pid
SlurmdPidFile=/run/slurmd.pid
SlurmctldLogFile=/var/log/slurm/slurmctld.log
SlurmdLogFile=/var/log/slurm/slurmd.log
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
JobAcctGatherType=jobacct_gather/none
AccountingStorageType=accounting_storage/none
SchedulerType=sched/backfill
SelectType=select/cons_tres
SelectTypeParameters=CR_Core_Memory
MinJobAge=600
ReturnToService=2
NodeName=${host} CPUs=${cpus} RealMemory=${mem_mb} State=UNKNOWN
PartitionName=main Nodes=${host} Default=YES MaxTime=INFINITE State=UP
CONF
pgrep -x slurmctld >/dev/null || /usr/sbin/slurmctld
pgrep -x slurmd >/dev/null || /usr/sbin/slurmd
for _ in $(seq 1 60); do
  if sinfo -h -o '%t' 2>/dev/null | grep -qE '^(idle|mix|alloc)'; then
    sinfo
    exit 0
  fi
  sleep 1
done
echo "the SLURM node did not come up:" >&2
sinfo >&2 || true
tail -n 20 /var/log/slurm/slurmctld.log /var/log/slurm/slurmd.log >&2 || true
exit 1
