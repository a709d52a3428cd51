#!/usr/bin/env bash
# Stop what .ci/slurm-up.sh started, by pid file: each pid is signalled only if /proc/PID/comm
# names the daemon we expect (a stale pid file may point at an unrelated process by now).
set -u

stop_daemon() {  # stop_daemon NAME PIDFILE
  local name=$1 pidfile=$2 pid comm
  if [ ! -s "$pidfile" ]; then
    echo "slurm-down: $name: no pid file"
    return 0
  fi
  pid=$(cat "$pidfile")
  comm=$(cat "/proc/$pid/comm" 2>/dev/null || true)
  if [ "$comm" = "$name" ]; then
    kill -TERM "$pid"
    for _ in $(seq 1 60); do
      kill -0 "$pid" 2>/dev/null || break
      sleep 0.25
    done
    if kill -0 "$pid" 2>/dev/null && [ "$(cat "/proc/$pid/comm" 2>/dev/null)" = "$name" ]; then
      echo "slurm-down: $name ($pid) ignored SIGTERM for 15 s: SIGKILL"
      kill -KILL "$pid"
    fi
    echo "slurm-down: $name ($pid) stopped"
  else
    echo "slurm-down: $name: pid $pid in $pidfile is not running as $name (${comm:-gone}); left alone"
  fi
  # slurmctld and slurmdbd run as 'slurm' and cannot remove their pid files in /run themselves
  rm -f "$pidfile"
}

# cancel jobs still queued or running (a stage killed by its time limit), while the controller is up
if [ -s /run/slurmctld.pid ] && command -v scancel >/dev/null; then
  timeout 20 scancel --user=root 2>/dev/null || true
fi
stop_daemon slurmd    /run/slurmd.pid
stop_daemon slurmctld /run/slurmctld.pid
stop_daemon slurmdbd  /run/slurmdbd.pid
stop_daemon mariadbd  /run/mysqld/mysqld.pid
stop_daemon munged    /run/munge/munged.pid
exit 0
