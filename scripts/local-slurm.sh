#!/usr/bin/env bash
# Bring up a single-node SLURM on this machine: one partition, this host as its only node.
#
# For the batch-cluster integration test (tests/test_slurm.py) and for trying
# `--batch-file` by hand. Idempotent: run it again and it only starts what is not
# running. Needs root and a Debian-family system (apt-get; packages slurmctld, slurmd,
# munge). Nothing here is needed on a real cluster.
#
#   sudo scripts/local-slurm.sh          # install if needed, configure, start, wait until idle
#   sudo scripts/local-slurm.sh --stop   # stop the daemons this script starts
#
# Exit status: 0 when `sinfo` shows the node usable, 1 otherwise (the reason on stderr).
set -euo pipefail

PARTITION=${LEADLINE_SLURM_PARTITION:-leadline}
CONF_DIR=/etc/slurm
CONF=$CONF_DIR/slurm.conf
SPOOL_CTLD=/var/spool/slurmctld
SPOOL_D=/var/spool/slurmd
LOG_DIR=/var/log/slurm
RUN_DIR=/run/slurm

say() { echo "local-slurm: $*" >&2; }
die() { say "$*"; exit 1; }

if [[ ${1:-} == "--stop" ]]; then
    for pidfile in "$RUN_DIR/slurmd.pid" "$RUN_DIR/slurmctld.pid" /run/munge/munged.pid; do
        if [[ -s $pidfile ]] && kill -0 "$(cat "$pidfile")" 2>/dev/null; then
            kill "$(cat "$pidfile")"
        fi
    done
    exit 0
fi

[[ $(id -u) -eq 0 ]] || die "needs root (packages, /etc/slurm, daemons)"

# --------------------------------------------------------------------------- packages
if ! command -v slurmctld >/dev/null || ! command -v slurmd >/dev/null || ! command -v munged >/dev/null \
    || ! command -v sbatch >/dev/null; then
    command -v apt-get >/dev/null || die "no apt-get: install slurmctld, slurmd and munge by hand"
    say "installing slurmctld slurmd munge (apt-get)"
    export DEBIAN_FRONTEND=noninteractive
    apt-get update -qq >/dev/null || die "apt-get update failed (no network or no mirror?)"
    apt-get install -y -qq --no-install-recommends slurmctld slurmd slurm-client munge >/dev/null \
        || die "apt-get install slurmctld slurmd slurm-client munge failed"
fi

# --------------------------------------------------------------------------- munge
mkdir -p /etc/munge /var/lib/munge /var/log/munge /run/munge
if [[ ! -s /etc/munge/munge.key ]]; then
    if command -v mungekey >/dev/null; then
        mungekey --create --keyfile=/etc/munge/munge.key
    else
        dd if=/dev/urandom bs=1 count=1024 of=/etc/munge/munge.key status=none
    fi
fi
munge_user=$(id -u munge >/dev/null 2>&1 && echo munge || echo root)
chown -R "$munge_user:" /etc/munge /var/lib/munge /var/log/munge /run/munge
chmod 0700 /etc/munge /var/lib/munge /var/log/munge
chmod 0755 /run/munge
chmod 0400 /etc/munge/munge.key
if ! munge -n 2>/dev/null | unmunge >/dev/null 2>&1; then
    say "starting munged"
    if [[ $munge_user == root ]]; then munged --force; else runuser -u munge -- munged --force; fi
    for _ in $(seq 50); do munge -n 2>/dev/null | unmunge >/dev/null 2>&1 && break; sleep 0.1; done
    munge -n | unmunge >/dev/null || die "munged does not answer"
fi

# --------------------------------------------------------------------------- slurm.conf
host=$(hostname -s)
cpus=$(nproc)
mem_mb=$(awk '/MemTotal/ {printf "%d", $2 / 1024 * 0.9}' /proc/meminfo)
mkdir -p "$CONF_DIR" "$SPOOL_CTLD" "$SPOOL_D" "$LOG_DIR" "$RUN_DIR"
wanted=$(cat <<EOF
# written by leadline scripts/local-slurm.sh: a single-node cluster for tests
ClusterName=leadline-local
SlurmctldHost=$host
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
StateSaveLocation=$SPOOL_CTLD
SlurmdSpoolDir=$SPOOL_D
SlurmctldPidFile=$RUN_DIR/slurmctld.pid
SlurmdPidFile=$RUN_DIR/slurmd.pid
SlurmctldLogFile=$LOG_DIR/slurmctld.log
SlurmdLogFile=$LOG_DIR/slurmd.log
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
JobAcctGatherType=jobacct_gather/none
AccountingStorageType=accounting_storage/none
SchedulerType=sched/backfill
SelectType=select/cons_tres
SelectTypeParameters=CR_Core
MpiDefault=none
ReturnToService=2
KillWait=5
InactiveLimit=0
MinJobAge=30
NodeName=$host CPUs=$cpus RealMemory=$mem_mb State=UNKNOWN
PartitionName=$PARTITION Nodes=$host Default=YES MaxTime=INFINITE State=UP OverSubscribe=NO
EOF
)
if [[ ! -f $CONF ]] || [[ "$(cat "$CONF")" != "$wanted" ]]; then
    say "writing $CONF"
    printf '%s\n' "$wanted" > "$CONF"
    changed=1
else
    changed=0
fi
# cgroup.conf is read by slurmd even with task/none on some versions; keep it inert
[[ -f $CONF_DIR/cgroup.conf ]] || printf 'CgroupPlugin=autodetect\nIgnoreSystemd=yes\n' > "$CONF_DIR/cgroup.conf"

running() { [[ -s $1 ]] && kill -0 "$(cat "$1")" 2>/dev/null; }

if [[ $changed == 1 ]]; then
    for d in slurmd slurmctld; do
        if running "$RUN_DIR/$d.pid"; then kill "$(cat "$RUN_DIR/$d.pid")"; sleep 1; fi
    done
fi
if ! running "$RUN_DIR/slurmctld.pid"; then
    say "starting slurmctld"
    slurmctld -i   # -i: ignore state left by an earlier configuration
fi
if ! running "$RUN_DIR/slurmd.pid"; then
    say "starting slurmd"
    slurmd
fi

# --------------------------------------------------------------------------- wait until usable
for _ in $(seq 60); do
    state=$(sinfo -h -p "$PARTITION" -o '%t' 2>/dev/null | head -n1 || true)
    case $state in
        idle*|mix*|alloc*) say "node $host is $state in partition $PARTITION"; exit 0 ;;
        down*|drain*) scontrol update NodeName="$host" State=RESUME >/dev/null 2>&1 || true ;;
    esac
    sleep 1
done
die "SLURM did not become usable (sinfo state: ${state:-none}); see $LOG_DIR"
