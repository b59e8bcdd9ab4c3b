#!/usr/bin/env bash
# A single-node SLURM on this machine, for the cluster test (`make test-cluster`) and for trying
# the workflow's SLURM profile: munge, slurmctld and slurmd, configured in a private folder.
#
#   cluster/single-node-slurm.sh start    # start (or reuse) it; prints `export SLURM_CONF=...`
#   cluster/single-node-slurm.sh status   # sinfo
#   cluster/single-node-slurm.sh stop     # stop what `start` started
#
# Needs root and the Debian packages slurm-wlm and munge (apt-get install -y slurm-wlm munge).
# The configuration lives in $EMULANT_SLURM_DIR (default /tmp/emulant-slurm); clients find it
# through SLURM_CONF, and, where the machine has no /etc/slurm/slurm.conf of its own, through a
# link there (job steps started inside a job read the default path). Exit codes: 0 ready,
# 3 SLURM cannot start on this machine (not root, packages missing), 1 it started but failed.
set -euo pipefail

DIR=${EMULANT_SLURM_DIR:-/tmp/emulant-slurm}
CONF=$DIR/slurm.conf
PARTITION=${EMULANT_SLURM_PARTITION:-main}
export SLURM_CONF=$CONF

cannot() { echo "single-node SLURM cannot start here: $*" >&2; exit 3; }
fail() { echo "single-node SLURM failed: $*" >&2; exit 1; }

running() { [ -f "$1" ] && kill -0 "$(cat "$1")" 2>/dev/null; }

start_munge() {
  if [ -S /run/munge/munge.socket.2 ] && munge -n >/dev/null 2>&1; then
    return 0  # a munge daemon already answers (ours or the machine's)
  fi
  if [ ! -s /etc/munge/munge.key ]; then
    mkdir -p /etc/munge
    dd if=/dev/urandom of=/etc/munge/munge.key bs=1024 count=1 status=none
    chown munge:munge /etc/munge/munge.key
    chmod 400 /etc/munge/munge.key
  fi
  mkdir -p /run/munge /var/lib/munge /var/log/munge
  chown munge:munge /run/munge /var/lib/munge /var/log/munge
  su -s /bin/sh munge -c "/usr/sbin/munged --pid-file=/run/munge/munged.pid"
  cp /run/munge/munged.pid "$DIR/munged.pid" 2>/dev/null || true
  for _ in $(seq 20); do munge -n >/dev/null 2>&1 && return 0; sleep 0.5; done
  fail "munged does not answer"
}

write_conf() {
  local host cpus mem
  host=$(hostname)
  cpus=$(nproc)
  mem=$(awk '/MemTotal/ {printf "%d", $2 / 1024 * 0.9}' /proc/meminfo)
  mkdir -p "$DIR/state" "$DIR/spool"
  cat > "$CONF" <<CONF
# written by cluster/single-node-slurm.sh: one node, one partition, no accounting
ClusterName=emulant
SlurmctldHost=$host(127.0.0.1)
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
SelectType=select/cons_tres
SelectTypeParameters=CR_Core_Memory
AccountingStorageType=accounting_storage/none
JobAcctGatherType=jobacct_gather/none
ReturnToService=2
MinJobAge=600
StateSaveLocation=$DIR/state
SlurmdSpoolDir=$DIR/spool
SlurmctldPidFile=$DIR/slurmctld.pid
SlurmdPidFile=$DIR/slurmd.pid
SlurmctldLogFile=$DIR/slurmctld.log
SlurmdLogFile=$DIR/slurmd.log
NodeName=$host NodeAddr=127.0.0.1 CPUs=$cpus RealMemory=$mem State=UNKNOWN
PartitionName=$PARTITION Nodes=$host Default=YES MaxTime=INFINITE State=UP
CONF
}

start() {
  [ "$(id -u)" = 0 ] || cannot "it needs root (it starts munged, slurmctld and slurmd)"
  for b in /usr/sbin/munged /usr/sbin/slurmctld /usr/sbin/slurmd sbatch squeue sinfo; do
    command -v "$b" >/dev/null 2>&1 || cannot "$b is missing (apt-get install -y slurm-wlm munge)"
  done
  mkdir -p "$DIR"
  if [ ! -e /etc/slurm/slurm.conf ]; then
    mkdir -p /etc/slurm
    ln -s "$CONF" /etc/slurm/slurm.conf
  fi
  if running "$DIR/slurmctld.pid" && running "$DIR/slurmd.pid" && sinfo -h >/dev/null 2>&1; then
    echo "export SLURM_CONF=$CONF"
    return 0
  fi
  start_munge
  write_conf
  running "$DIR/slurmctld.pid" || /usr/sbin/slurmctld -f "$CONF" || fail "slurmctld did not start (see $DIR/slurmctld.log)"
  running "$DIR/slurmd.pid" || /usr/sbin/slurmd -f "$CONF" || fail "slurmd did not start (see $DIR/slurmd.log)"
  for _ in $(seq 60); do
    state=$(sinfo -h -N -o '%t' 2>/dev/null | head -n 1 || true)
    if [ "$state" = idle ] || [ "$state" = mix ] || [ "$state" = alloc ]; then
      echo "export SLURM_CONF=$CONF"
      return 0
    fi
    sleep 1
  done
  fail "the node is not idle after 60 s (state: ${state:-none}; see $DIR/slurmctld.log, $DIR/slurmd.log)"
}

stop() {
  for d in slurmd slurmctld munged; do
    if running "$DIR/$d.pid"; then
      kill "$(cat "$DIR/$d.pid")"
    fi
    rm -f "$DIR/$d.pid"
  done
  if [ "$(readlink /etc/slurm/slurm.conf 2>/dev/null)" = "$CONF" ]; then
    rm -f /etc/slurm/slurm.conf
  fi
}

case "${1:-start}" in
  start) start ;;
  stop) stop ;;
  status) sinfo ;;
  *) echo "usage: $0 start|stop|status" >&2; exit 2 ;;
esac
