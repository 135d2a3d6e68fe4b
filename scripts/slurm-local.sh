#!/usr/bin/env bash
# slurm-local.sh: a one-node Slurm cluster on this machine, to try the recipe
# in docs/scale.md and for the test that runs it (cmd/heed/slurm_test.go).
#
#   scripts/slurm-local.sh start    # (the default) up, and waits until the node is idle
#   scripts/slurm-local.sh status   # exit 0 when the node is idle
#   scripts/slurm-local.sh stop     # stops the daemons it started
#
# Needs Debian's (or Ubuntu's) slurm-wlm and munge packages and root, since
# slurmd runs jobs as their users: `sudo apt-get install slurm-wlm munge`.
# Uses no systemd: munged, slurmctld and slurmd are started directly, so it
# works in a container too. The node is this host (hostname -s, at
# 127.0.0.1) with the CPUs and memory `slurmd -C` finds, in one partition
# `local`; no cgroups (proctrack/linuxproc, task/none), no accounting
# database. State and logs go to $HEED_SLURM_DIR (default
# /var/lib/heed-slurm); the configuration to /etc/slurm/slurm.conf, where
# sbatch and sinfo look for it, unless a slurm.conf not written by this
# script is there (then it stops: it never replaces a real cluster's).
# Running it again is quick: what runs and is configured alike is kept.
set -euo pipefail

dir=${HEED_SLURM_DIR:-/var/lib/heed-slurm}
conf=/etc/slurm/slurm.conf
mark="# written by heed's scripts/slurm-local.sh"

say() { echo "slurm-local: $*" >&2; }
die() { say "$*"; exit 1; }

alive() { # alive PIDFILE: the process in the file runs
  [ -s "$1" ] && kill -0 "$(cat "$1")" 2>/dev/null
}

stop_pid() { # stop_pid NAME PIDFILE
  if alive "$2"; then
    local pid; pid=$(cat "$2")
    kill "$pid"
    for _ in $(seq 50); do kill -0 "$pid" 2>/dev/null || break; sleep 0.1; done
    if kill -0 "$pid" 2>/dev/null; then kill -9 "$pid" 2>/dev/null || true; fi
    say "stopped $1 ($pid)"
  fi
  rm -f "$2"
}

node_state() {
  sinfo -h -N -n "$node" -o %T 2>/dev/null | head -1
}

node=$(hostname -s)

case ${1:-start} in
stop)
  stop_pid slurmd "$dir/slurmd.pid"
  stop_pid slurmctld "$dir/slurmctld.pid"
  if [ -e "$dir/munged.ours" ]; then
    stop_pid munged /run/munge/munged.pid
    rm -f "$dir/munged.ours"
  fi
  exit 0
  ;;
status)
  s=$(node_state || true)
  echo "node $node: ${s:-no answer from slurmctld}"
  [ "$s" = idle ] || [ "$s" = mixed ] || [ "$s" = allocated ]
  exit
  ;;
start) ;;
*) die "usage: $0 [start|status|stop]" ;;
esac

[ "$(id -u)" -eq 0 ] || die "run as root (slurmd runs jobs as their users)"
for b in munged slurmctld slurmd sbatch sinfo; do
  command -v "$b" >/dev/null 2>&1 || [ -x "/usr/sbin/$b" ] ||
    die "$b not found: apt-get install slurm-wlm munge"
done
PATH=$PATH:/usr/sbin

mkdir -p "$dir/ctld" "$dir/spool" /etc/slurm

# munge: the key the package made, or a new one; munged runs as munge.
if [ ! -s /etc/munge/munge.key ]; then
  if command -v mungekey >/dev/null 2>&1; then mungekey --create >/dev/null
  else dd if=/dev/urandom of=/etc/munge/munge.key bs=1 count=1024 status=none; fi
  chown munge:munge /etc/munge/munge.key
  chmod 0400 /etc/munge/munge.key
fi
install -d -o munge -g munge -m 0755 /run/munge
install -d -o munge -g munge -m 0700 /var/log/munge /var/lib/munge
if ! munge -n </dev/null 2>/dev/null | unmunge >/dev/null 2>&1; then
  runuser -u munge -- munged
  touch "$dir/munged.ours"
  for _ in $(seq 50); do munge -n </dev/null 2>/dev/null | unmunge >/dev/null 2>&1 && break; sleep 0.1; done
  munge -n </dev/null | unmunge >/dev/null || die "munged does not answer (see /var/log/munge/munged.log)"
  say "started munged"
fi

# slurm.conf for this host.
hw=$(slurmd -C | head -1)   # NodeName=HOST CPUs=... RealMemory=...
case $hw in NodeName=*" CPUs="*) ;; *) die "slurmd -C printed no node line: $hw" ;; esac
new=$(cat <<EOF
$mark: a one-node cluster on $node.
# It replaces this file when run again; delete the first line to keep your edits.
ClusterName=heedlocal
SlurmctldHost=$node(127.0.0.1)
SlurmUser=root
AuthType=auth/munge
StateSaveLocation=$dir/ctld
SlurmdSpoolDir=$dir/spool
SlurmctldPidFile=$dir/slurmctld.pid
SlurmdPidFile=$dir/slurmd.pid
SlurmctldLogFile=$dir/slurmctld.log
SlurmdLogFile=$dir/slurmd.log
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
SelectType=select/cons_tres
SelectTypeParameters=CR_CPU
SchedulerType=sched/builtin
# Start jobs at the next scheduling pass (about a second) instead of up to
# 3 s later: a test submits many short jobs.
SchedulerParameters=batch_sched_delay=0,sched_min_interval=0
MpiDefault=none
JobAcctGatherType=jobacct_gather/none
AccountingStorageType=accounting_storage/none
JobCompType=jobcomp/none
ReturnToService=2
MinJobAge=600
KillWait=5
InactiveLimit=0
${hw/NodeName=$node /NodeName=$node NodeAddr=127.0.0.1 } State=UNKNOWN
PartitionName=local Nodes=$node Default=YES MaxTime=INFINITE State=UP
EOF
)
if [ -e "$conf" ] && ! head -1 "$conf" | grep -qF "$mark"; then
  die "$conf exists and was not written by this script: not replacing a cluster's configuration"
fi
if [ ! -e "$conf" ] || [ "$(cat "$conf")" != "$new" ]; then
  stop_pid slurmd "$dir/slurmd.pid"
  stop_pid slurmctld "$dir/slurmctld.pid"
  printf '%s\n' "$new" >"$conf"
  say "wrote $conf"
fi

if ! alive "$dir/slurmctld.pid"; then
  slurmctld || die "slurmctld did not start: $(tail -5 "$dir/slurmctld.log" 2>/dev/null)"
  say "started slurmctld"
fi
if ! alive "$dir/slurmd.pid"; then
  slurmd || die "slurmd did not start: $(tail -5 "$dir/slurmd.log" 2>/dev/null)"
  say "started slurmd"
fi

# Wait until the node takes jobs (a node left down or drained by an earlier
# run is resumed).
s=""
for i in $(seq 300); do
  s=$(node_state || true)
  case $s in
  idle | mixed | allocated) say "node $node is $s"; exit 0 ;;
  down* | drain*) [ $((i % 20)) -eq 1 ] && scontrol update nodename="$node" state=resume 2>/dev/null || true ;;
  esac
  sleep 0.2
done
say "node $node is still '${s:-unknown}' after 60 s; the last lines of the logs:"
tail -5 "$dir/slurmctld.log" "$dir/slurmd.log" >&2 || true
exit 1
