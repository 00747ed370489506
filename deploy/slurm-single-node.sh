#!/usr/bin/env bash
# A one-machine SLURM on loopback: munge, slurmctld and slurmd on this host, one partition.
#
# For trying `foldfarm run --cluster slurm` on a workstation, and for the tests (.ci/run runs it
# before pytest; tests/test_slurm.py needs it).  Run as root; idempotent: a second call finds
# everything up and returns at once.  It installs Debian's slurm-wlm and munge if they are missing,
# writes /etc/slurm/slurm.conf (only if there is none, or the one there is ours), starts the daemons
# by themselves (no systemd) and waits until the node takes jobs.
#
#   bash deploy/slurm-single-node.sh          # start (or check) it
#   bash deploy/slurm-single-node.sh stop     # stop the daemons it started
#
# Every daemon listens on 127.0.0.1 only.  The node offers SLURM_CPUS (default 8) CPUs, more than
# the machine has, so that a coordinator job and a few single-core worker jobs fit on a 2-core
# machine at once (the tests' jobs count small maps); SLURM is told not to drain the node for it.
set -euo pipefail

CONF=/etc/slurm/slurm.conf
MARK="# written by foldfarm deploy/slurm-single-node.sh"
PARTITION="${SLURM_PARTITION:-main}"
CPUS="${SLURM_CPUS:-8}"

say() { echo "slurm-single-node: $*" >&2; }

stop_daemons() {
    local daemon pids
    for daemon in slurmd slurmctld; do
        pids=$(pgrep -x "$daemon" || true)
        [[ -z "$pids" ]] && continue
        kill $pids
        for _ in $(seq 100); do pgrep -x "$daemon" >/dev/null || break; sleep 0.1; done
        say "stopped $daemon"
    done
}

if [[ "${1:-start}" == stop ]]; then
    stop_daemons
    exit 0
fi

[[ $(id -u) == 0 ]] || { say "run me as root (I install packages and start daemons)"; exit 2; }

node_idle() {
    sinfo --noheader --partition "$PARTITION" --format %t 2>/dev/null | grep -Eq '^(idle|mix|alloc)'
}
missing=0
for tool in slurmctld slurmd sbatch sinfo munged; do command -v "$tool" >/dev/null || missing=1; done
if [[ $missing == 1 ]]; then
    say "installing slurm-wlm and munge"
    export DEBIAN_FRONTEND=noninteractive
    apt-get install -y -qq slurm-wlm munge >/dev/null 2>&1 || { apt-get update -qq && apt-get install -y -qq slurm-wlm munge >/dev/null; }
fi

# munge: the daemons authenticate each other with it.  munged wants its socket folder and its key.
mkdir -p /run/munge /var/log/munge /var/lib/munge /etc/munge
chown munge:munge /run/munge /var/log/munge /var/lib/munge /etc/munge
chmod 0700 /etc/munge
chmod 0755 /run/munge
if [[ ! -s /etc/munge/munge.key ]]; then
    dd if=/dev/urandom of=/etc/munge/munge.key bs=1 count=128 status=none
    chown munge:munge /etc/munge/munge.key
    chmod 0400 /etc/munge/munge.key
fi
if ! munge -n </dev/null 2>/dev/null | unmunge >/dev/null 2>&1; then
    runuser -u munge -- /usr/sbin/munged
    for _ in $(seq 50); do munge -n </dev/null 2>/dev/null | unmunge >/dev/null 2>&1 && break; sleep 0.1; done
fi

# slurm.conf: one node on 127.0.0.1, a partition, plugins that need neither cgroups nor accounting.
node=$(hostname -s)
if [[ ! -e $CONF ]] || grep -qF "$MARK" "$CONF"; then
    memory=$(slurmd -C | sed -n 's/.*RealMemory=\([0-9]*\).*/\1/p')
    memory=$((memory * 9 / 10))  # a little under what slurmd reports, or the node drains
    mkdir -p /etc/slurm /var/spool/slurmctld /var/spool/slurmd /var/log/slurm
    chown slurm:slurm /var/spool/slurmctld /var/log/slurm
    new=$(mktemp)
    cat >"$new" <<EOF
$MARK
ClusterName=foldfarm-test
SlurmctldHost=$node(127.0.0.1)
SlurmUser=slurm
AuthType=auth/munge
CommunicationParameters=NoCtldInAddrAny,NoInAddrAny
SlurmctldPort=6817
SlurmdPort=6818
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
SelectType=select/cons_tres
SelectTypeParameters=CR_CPU
SchedulerType=sched/backfill
SlurmdParameters=config_overrides
ReturnToService=2
JobRequeue=1
KillWait=5
# A requeued job waits this long before it starts again (SLURM's default, 120 s, is for big clusters).
AuthInfo=cred_expire=8
MinJobAge=60
SchedulerParameters=sched_interval=2
NodeName=$node NodeAddr=127.0.0.1 CPUs=$CPUS RealMemory=$memory State=UNKNOWN
PartitionName=$PARTITION Nodes=$node Default=YES MaxTime=INFINITE State=UP
EOF
    if cmp -s "$new" "$CONF"; then
        rm -f "$new"
    else
        chmod 0644 "$new"
        mv "$new" "$CONF"
        if pgrep -x slurmctld >/dev/null || pgrep -x slurmd >/dev/null; then
            say "slurm.conf changed: restarting the daemons"  # some settings are read at start only
            stop_daemons
        fi
    fi
fi

if ! pgrep -x slurmctld >/dev/null; then  # a second slurmctld would kill the first
    slurmctld
fi
if ! pgrep -x slurmd >/dev/null; then
    slurmd
fi

for _ in $(seq 300); do
    if node_idle; then
        say "up (partition $PARTITION, node $node on 127.0.0.1, $CPUS CPUs)"
        exit 0
    fi
    state=$(sinfo --noheader --partition "$PARTITION" --format %t 2>/dev/null || true)
    if [[ $state == drain* || $state == down* ]]; then
        scontrol update NodeName="$node" State=RESUME >/dev/null 2>&1 || true
    fi
    sleep 0.2
done
say "the node did not become idle; see /var/log/slurm/slurmctld.log and slurmd.log"
sinfo >&2 || true
exit 1
