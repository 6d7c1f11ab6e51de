#!/usr/bin/env bash
# A single-node Slurm on localhost for the cluster integration test (tests/slurm.rs).
#   bash scripts/slurm_local.sh start   # install slurm-wlm and munge if absent, start munged,
#                                       # slurmctld and slurmd, wait until the node is idle
#   bash scripts/slurm_local.sh stop    # stop the daemons this script started, by PID
# Needs root. Exit status 3: cannot run here (not root, or the packages cannot be installed);
# the test then skips. It writes /etc/slurm/slurm.conf (and refuses, exit 3, where a Slurm
# configuration it did not write is already there) and the munge key if absent; state and
# spool folders are emptied at every start. Only daemons it started are stopped, from the pid
# files named in $STARTED, in the order slurmd, slurmctld, munged.
set -euo pipefail

STARTED=/run/axsift-slurm-local.started
CONF=/etc/slurm/slurm.conf
WAIT_S=30
MARKER="# Written by axsift scripts/slurm_local.sh"

say() { echo "slurm_local: $*" >&2; }

stop_pid_file() {
    local file=$1 pid
    [ -s "$file" ] || return 0
    pid=$(cat "$file")
    [[ "$pid" =~ ^[0-9]+$ ]] || return 0
    kill -TERM "$pid" 2>/dev/null || return 0
    for _ in $(seq 50); do
        kill -0 "$pid" 2>/dev/null || return 0
        sleep 0.2
    done
    kill -KILL "$pid" 2>/dev/null || true
}

stop() {
    [ -f "$STARTED" ] || return 0
    for daemon in slurmd slurmctld munged; do
        local file
        file=$(awk -v d="$daemon" '$1 == d { print $2 }' "$STARTED")
        [ -n "$file" ] && stop_pid_file "$file"
    done
    rm -f "$STARTED"
}

install_packages() {
    command -v slurmctld >/dev/null && command -v slurmd >/dev/null && command -v munged >/dev/null && return 0
    command -v apt-get >/dev/null || { say "slurm-wlm is not installed and apt-get is unavailable"; exit 3; }
    export DEBIAN_FRONTEND=noninteractive
    if ! timeout 180 apt-get install -y -q --no-install-recommends slurm-wlm munge >/dev/null 2>&1; then
        timeout 180 apt-get update -q >/dev/null 2>&1 || true
        timeout 180 apt-get install -y -q --no-install-recommends slurm-wlm munge >/dev/null 2>&1 || { say "apt-get cannot install slurm-wlm munge here"; exit 3; }
    fi
}

start() {
    [ "$(id -u)" = 0 ] || { say "needs root"; exit 3; }
    if [ -e "$CONF" ] && ! head -n 1 "$CONF" | grep -q "^$MARKER"; then
        say "$CONF exists and was not written by this script: a real cluster's configuration is left alone"
        exit 3
    fi
    install_packages
    stop
    trap 'say "start failed; stopping what was started"; stop' ERR
    : >"$STARTED"

    if [ ! -s /etc/munge/munge.key ]; then
        install -d -o munge -g munge -m 0700 /etc/munge
        mungekey --create --keyfile=/etc/munge/munge.key
    fi
    chown munge:munge /etc/munge/munge.key
    chmod 0400 /etc/munge/munge.key
    install -d -o munge -g munge /run/munge
    if ! munge -n 2>/dev/null | unmunge >/dev/null 2>&1; then
        runuser -u munge -- /usr/sbin/munged
        echo "munged /run/munge/munged.pid" >>"$STARTED"
        for _ in $(seq 25); do munge -n 2>/dev/null | unmunge >/dev/null 2>&1 && break; sleep 0.2; done
    fi
    munge -n | unmunge >/dev/null

    local host node
    host=$(hostname -s)
    node=$(slurmd -C | head -n 1)
    install -d /etc/slurm /var/log/slurm
    cat >"$CONF" <<CONF
${MARKER}: a single-node test cluster on localhost.
ClusterName=axsift-local
SlurmctldHost=${host}(127.0.0.1)
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
CredType=cred/munge
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
MpiDefault=none
AccountingStorageType=accounting_storage/none
JobCompType=jobcomp/none
JobAcctGatherType=jobacct_gather/none
SelectType=select/cons_tres
SelectTypeParameters=CR_Core
ReturnToService=2
SchedulerParameters=batch_sched_delay=0,sched_min_interval=0
DependencyParameters=kill_invalid_depend
MinJobAge=300
StateSaveLocation=/var/spool/slurmctld
SlurmdSpoolDir=/var/spool/slurmd
SlurmctldPidFile=/run/slurmctld.pid
SlurmdPidFile=/run/slurmd.pid
SlurmctldLogFile=/var/log/slurm/slurmctld.log
SlurmdLogFile=/var/log/slurm/slurmd.log
${node} NodeAddr=127.0.0.1 State=UNKNOWN
PartitionName=debug Nodes=ALL Default=YES MaxTime=INFINITE State=UP
CONF
    rm -rf /var/spool/slurmctld /var/spool/slurmd
    install -d /var/spool/slurmctld /var/spool/slurmd
    slurmctld
    echo "slurmctld /run/slurmctld.pid" >>"$STARTED"
    slurmd
    echo "slurmd /run/slurmd.pid" >>"$STARTED"
    local deadline=$((SECONDS + WAIT_S))
    until [ "$(timeout 5 sinfo -h -N -o %T 2>/dev/null | head -n 1)" = idle ]; do
        if [ "$SECONDS" -ge "$deadline" ]; then
            say "node not idle after ${WAIT_S} s: $(timeout 5 sinfo -h -N -o %T 2>&1 | head -n 1)"
            false
        fi
        sleep 0.3
    done
    trap - ERR
    say "idle"
}

case "${1:-}" in
    start) start ;;
    stop) stop ;;
    *) echo "usage: $0 start|stop" >&2; exit 2 ;;
esac
