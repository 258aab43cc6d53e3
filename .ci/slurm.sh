#!/usr/bin/env bash
# A single-node Slurm on loopback for the cluster tests, without systemd.
#
#   bash .ci/slurm.sh install   # apt-get install slurmctld slurmd slurm-client munge
#   bash .ci/slurm.sh start     # write slurm.conf, start munged, slurmctld, slurmd; wait for idle
#   bash .ci/slurm.sh stop      # stop the three daemons by the PIDs recorded at start
#   bash .ci/slurm.sh status    # sinfo
#
# State lives under $ACTUARY_SLURM_STATE (default /tmp/actuary-slurm), removed
# before every start. slurm.conf is written to /etc/slurm/slurm.conf (the
# path the Slurm commands read by default) unless a slurm.conf that this
# script did not write is already there; then it goes under the state folder
# and the script prints the SLURM_CONF to export.
set -euo pipefail

STATE="${ACTUARY_SLURM_STATE:-/tmp/actuary-slurm}"
MARK="# written by actuary .ci/slurm.sh"
SUDO=""
if [ "$(id -u)" != "0" ]; then SUDO="sudo"; fi

conf_path() {
  if [ -n "${SLURM_CONF:-}" ]; then echo "$SLURM_CONF"; return; fi
  local etc=/etc/slurm/slurm.conf
  if [ ! -e "$etc" ] || grep -qF "$MARK" "$etc"; then echo "$etc"; else echo "$STATE/slurm.conf"; fi
}

install() {
  export DEBIAN_FRONTEND=noninteractive
  if command -v slurmctld >/dev/null && command -v slurmd >/dev/null && command -v sbatch >/dev/null \
      && command -v munged >/dev/null; then
    return 0
  fi
  $SUDO apt-get update -qq
  $SUDO apt-get install -y -qq --no-install-recommends slurmctld slurmd slurm-client munge >/dev/null
}

stop() {
  local f pid
  for f in slurmd slurmctld munged; do
    if [ -f "$STATE/$f.pid" ]; then
      pid="$(cat "$STATE/$f.pid")"
      if kill -0 "$pid" 2>/dev/null; then
        $SUDO kill "$pid" 2>/dev/null || true
        for _ in $(seq 1 50); do kill -0 "$pid" 2>/dev/null || break; sleep 0.1; done
        kill -0 "$pid" 2>/dev/null && $SUDO kill -9 "$pid" 2>/dev/null || true
      fi
      rm -f "$STATE/$f.pid"
    fi
  done
}

start() {
  stop
  rm -rf "$STATE"
  mkdir -p "$STATE/ctld" "$STATE/spool" "$STATE/munge" "$STATE/log"
  local conf cpus mem
  conf="$(conf_path)"
  cpus="$(nproc)"
  mem="$(awk '/MemTotal/ {printf "%d", $2 / 1024 * 0.9}' /proc/meminfo)"
  mkdir -p "$(dirname "$conf")"
  cat >"$conf" <<EOF
$MARK
ClusterName=actuary-ci
SlurmctldHost=localhost(127.0.0.1)
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
CryptoType=crypto/munge
MpiDefault=none
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
JobAcctGatherType=jobacct_gather/none
AccountingStorageType=accounting_storage/none
JobCompType=jobcomp/none
SchedulerType=sched/backfill
SelectType=select/cons_tres
SelectTypeParameters=CR_Core
SchedulerParameters=batch_sched_delay=0,sched_min_interval=0
ReturnToService=2
MinJobAge=600
StateSaveLocation=$STATE/ctld
SlurmdSpoolDir=$STATE/spool
SlurmctldPidFile=$STATE/slurmctld.daemon.pid
SlurmdPidFile=$STATE/slurmd.daemon.pid
SlurmctldLogFile=$STATE/log/slurmctld.log
SlurmdLogFile=$STATE/log/slurmd.log
SlurmctldPort=6817
SlurmdPort=6818
NodeName=localhost NodeAddr=127.0.0.1 CPUs=$cpus RealMemory=$mem State=UNKNOWN
PartitionName=main Nodes=localhost Default=YES MaxTime=INFINITE State=UP
EOF
  # munge: a key of our own when the package made none; the socket under the state folder.
  if [ ! -s /etc/munge/munge.key ]; then
    $SUDO mkdir -p /etc/munge
    $SUDO dd if=/dev/urandom of=/etc/munge/munge.key bs=1024 count=1 status=none
    $SUDO chmod 400 /etc/munge/munge.key
  fi
  $SUDO chown root:root /etc/munge/munge.key 2>/dev/null || true
  $SUDO mkdir -p /run/munge /var/lib/munge /var/log/munge
  $SUDO munged --force --foreground --key-file=/etc/munge/munge.key \
    --socket=/run/munge/munge.socket.2 --pid-file="$STATE/munge/munged.pid" \
    --log-file="$STATE/log/munged.log" >/dev/null 2>&1 &
  echo $! >"$STATE/munged.pid"
  for _ in $(seq 1 50); do [ -S /run/munge/munge.socket.2 ] && break; sleep 0.1; done
  export SLURM_CONF="$conf"
  $SUDO env SLURM_CONF="$conf" slurmctld -D -i >"$STATE/log/slurmctld.out" 2>&1 &
  echo $! >"$STATE/slurmctld.pid"
  $SUDO env SLURM_CONF="$conf" slurmd -D -N localhost >"$STATE/log/slurmd.out" 2>&1 &
  echo $! >"$STATE/slurmd.pid"
  local state=""
  for _ in $(seq 1 120); do
    state="$(sinfo -h -N -o %T 2>/dev/null | head -n1 || true)"
    case "$state" in idle*) break ;; esac
    sleep 0.5
  done
  case "$state" in
    idle*) echo "slurm: node localhost idle (conf $conf, state $STATE)" ;;
    *)
      echo "slurm: node did not become idle (state '${state}'); logs follow" >&2
      tail -n 30 "$STATE"/log/*.log "$STATE"/log/*.out >&2 || true
      stop
      return 1
      ;;
  esac
  if [ "$conf" != "/etc/slurm/slurm.conf" ]; then
    echo "export SLURM_CONF=$conf"
  fi
}

case "${1:-}" in
  install) install ;;
  start) start ;;
  stop) stop ;;
  status) SLURM_CONF="$(conf_path)" sinfo ;;
  *) echo "usage: $0 install|start|stop|status" >&2; exit 2 ;;
esac
