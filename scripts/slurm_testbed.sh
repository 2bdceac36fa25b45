#!/usr/bin/env bash
# Start a single-node SLURM on this machine, as a test bed for the cluster routes of `ensemble`
# (dask-jobqueue workers and job arrays). Debian/Ubuntu, run as root, no systemd needed.
#
#   sudo bash scripts/slurm_testbed.sh        # about 30-60 s the first time, a few seconds after
#
# Safe to run again: it installs only what is missing, rewrites the configuration only when it
# changed (and then restarts the two SLURM daemons, by the pids in their pid files), starts only
# the daemons that are not running, and resumes a node left down or drained.
# The configuration follows the slurm.conf(5) manual: process tracking through /proc
# (proctrack/linuxproc) and no task plugin, so no cgroup.conf is needed (none is written, and a
# stale one is removed). One node named after `hostname` with CPUs = `nproc`, in one default
# partition `debug`. Scheduling is per CPU, so several one-core jobs share the node.
# The last line says whether the test bed is ready; the exit status is 0 only then.
set -euo pipefail

readonly CONF_DIR=/etc/slurm
readonly CONF="$CONF_DIR/slurm.conf"
readonly LOG_DIR=/var/log/slurm
readonly CTLD_SPOOL=/var/spool/slurmctld
readonly SLURMD_SPOOL=/var/spool/slurmd
readonly WAIT_SECONDS="${SLURM_TESTBED_TIMEOUT:-90}"

say() { printf 'slurm-testbed: %s\n' "$*"; }
fail() { printf 'slurm-testbed: FAILED: %s\n' "$*" >&2; exit 1; }

[[ $(id -u) -eq 0 ]] || fail "must run as root (it installs packages and starts daemons)"

install_packages() {
    local missing=()
    for package in slurmctld slurmd slurm-client munge; do
        dpkg-query -W -f='${Status}' "$package" 2>/dev/null | grep -q "install ok installed" \
            || missing+=("$package")
    done
    if ((${#missing[@]})); then
        say "installing ${missing[*]}"
        export DEBIAN_FRONTEND=noninteractive
        apt-get update -qq
        apt-get install -y -qq "${missing[@]}" >/dev/null
    fi
}

# True when the pid in the file belongs to a live process whose command is the given program.
pidfile_alive() {
    local pidfile=$1 program=$2 pid
    [[ -s $pidfile ]] || return 1
    pid=$(<"$pidfile")
    [[ -r /proc/$pid/comm ]] && [[ $(</proc/"$pid"/comm) == "$program" ]]
}

start_munge() {
    if [[ ! -s /etc/munge/munge.key ]]; then
        say "creating a munge key"
        mkdir -p /etc/munge
        if command -v mungekey >/dev/null; then
            mungekey --create --keyfile=/etc/munge/munge.key
        else
            dd if=/dev/urandom of=/etc/munge/munge.key bs=1024 count=1 status=none
        fi
    fi
    chown munge:munge /etc/munge/munge.key
    chmod 0400 /etc/munge/munge.key
    install -d -o munge -g munge -m 0755 /run/munge
    install -d -o munge -g munge -m 0700 /var/lib/munge /var/log/munge
    if pidfile_alive /run/munge/munged.pid munged; then
        say "munged already running"
    else
        say "starting munged"
        runuser -u munge -- /usr/sbin/munged
    fi
    local tries=0
    until munge -n </dev/null | unmunge >/dev/null 2>&1; do
        ((++tries > 20)) && fail "munge does not answer (see /var/log/munge/munged.log)"
        sleep 0.5
    done
}

write_config() {
    local host cpus memory_mb new
    host=$(hostname)
    cpus=$(nproc)
    # Leave a tenth of the memory (at most 2 GiB) to the system, so slurmd never finds less
    # memory than configured (that would drain the node).
    memory_mb=$(awk '/^MemTotal:/ { total = int($2 / 1024); spare = int(total / 10);
                                    if (spare > 2048) spare = 2048; print total - spare }' /proc/meminfo)
    new=$(cat <<EOF
# Single-node test bed written by scripts/slurm_testbed.sh (ensemble). Do not use in production.
ClusterName=testbed
SlurmctldHost=$host(127.0.0.1)
SlurmUser=slurm
AuthType=auth/munge
CryptoType=crypto/munge
MpiDefault=none
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
SwitchType=switch/none
SchedulerType=sched/backfill
SelectType=select/cons_tres
SelectTypeParameters=CR_CPU
ReturnToService=2
# Keep finished jobs visible to scontrol for ten minutes (no accounting daemon here).
MinJobAge=600
AccountingStorageType=accounting_storage/none
JobAcctGatherType=jobacct_gather/none
StateSaveLocation=$CTLD_SPOOL
SlurmdSpoolDir=$SLURMD_SPOOL
SlurmctldPidFile=/run/slurmctld.pid
SlurmdPidFile=/run/slurmd.pid
SlurmctldLogFile=$LOG_DIR/slurmctld.log
SlurmdLogFile=$LOG_DIR/slurmd.log
SlurmctldTimeout=30
SlurmdTimeout=60
NodeName=$host NodeAddr=127.0.0.1 CPUs=$cpus RealMemory=$memory_mb State=UNKNOWN
PartitionName=debug Nodes=$host Default=YES MaxTime=INFINITE State=UP
EOF
)
    mkdir -p "$CONF_DIR" "$LOG_DIR"
    install -d -o slurm -g slurm -m 0755 "$CTLD_SPOOL"
    install -d -m 0755 "$SLURMD_SPOOL"
    chown slurm:slurm "$LOG_DIR"
    rm -f "$CONF_DIR/cgroup.conf"
    if [[ -f $CONF ]] && [[ $(<"$CONF") == "$new" ]]; then
        CONFIG_CHANGED=0
    else
        say "writing $CONF (node $host, $cpus CPUs, ${memory_mb} MB)"
        printf '%s\n' "$new" >"$CONF"
        CONFIG_CHANGED=1
    fi
}

# Stop the daemon whose pid is in the file (only that process), waiting for it to exit.
stop_daemon() {
    local pidfile=$1 program=$2 pid tries=0
    pidfile_alive "$pidfile" "$program" || return 0
    pid=$(<"$pidfile")
    say "configuration changed: stopping $program (pid $pid) to restart it"
    kill "$pid"
    while [[ -e /proc/$pid ]]; do
        ((++tries > 30)) && fail "$program (pid $pid) did not stop"
        sleep 0.5
    done
}

start_slurm() {
    local daemon
    for daemon in slurmctld slurmd; do
        if ((CONFIG_CHANGED)); then
            stop_daemon "/run/$daemon.pid" "$daemon"
        fi
        if pidfile_alive "/run/$daemon.pid" "$daemon"; then
            say "$daemon already running"
        else
            say "starting $daemon"
            "$daemon"
        fi
    done
}

# Wait until the node is idle (or busy with earlier jobs), resuming it if it came up down/drained.
wait_for_node() {
    local host state deadline
    host=$(hostname)
    deadline=$((SECONDS + WAIT_SECONDS))
    while ((SECONDS < deadline)); do
        state=$(sinfo --noheader --nodes="$host" --format=%T 2>/dev/null | head -n1 || true)
        case $state in
            idle | mixed | allocated | completing) return 0 ;;
            down* | drain* | fail*)
                scontrol update NodeName="$host" State=RESUME 2>/dev/null || true ;;
        esac
        sleep 1
    done
    fail "node $host is '${state:-unknown}' after ${WAIT_SECONDS}s (see $LOG_DIR/slurmctld.log and slurmd.log)"
}

check_srun() {
    local output
    output=$(timeout "$WAIT_SECONDS" srun --ntasks=1 --time=1 hostname 2>&1) \
        || fail "srun hostname did not work: $output"
    [[ $output == "$(hostname)" ]] || fail "srun hostname printed '$output'"
}

install_packages
start_munge
write_config
start_slurm
wait_for_node
check_srun
say "READY: single-node SLURM up (node $(hostname), $(nproc) CPUs, partition debug); srun works"
