#!/usr/bin/env bash
# Stand up a real single-node SLURM cluster on localhost, with accounting, for CI.
#
# Target: Debian 12 (bookworm), run as root, no systemd. Installs Debian's slurm, munge and MariaDB
# packages, then starts munged, mariadbd, slurmdbd, slurmctld and slurmd directly; every daemon
# leaves a pid file that .ci/slurm-down.sh uses to stop it again.
#
# Accounting (slurmdbd) is not optional: the SLURM executor plugin asks `sacct` for job states,
# and without accounting that query fails silently and Snakemake waits forever.
#
# Environment (all optional):
#   SLURM_CI_CLUSTER    cluster name              (default: wetpathci)
#   SLURM_CI_PARTITION  the single partition      (default: debug)
#   SLURM_CI_ACCOUNT    account created in accounting for the workflow's jobs (default: wetpath-ci)
set -euo pipefail

CLUSTER=${SLURM_CI_CLUSTER:-wetpathci}
PARTITION=${SLURM_CI_PARTITION:-debug}
ACCOUNT=${SLURM_CI_ACCOUNT:-wetpath-ci}
LOGDIR=/var/log/slurm

log() { echo "[slurm-up $(date -u +%T)] $*"; }

wait_for() {  # wait_for SECONDS WHAT COMMAND...: poll every 0.5 s until COMMAND succeeds
  local tries=$(( $1 * 2 )) what=$2
  shift 2
  for _ in $(seq 1 "$tries"); do
    "$@" >/dev/null 2>&1 && return 0
    sleep 0.5
  done
  echo "slurm-up: timed out after ${tries} polls waiting for $what" >&2
  return 1
}

running() {  # running NAME PIDFILE: is the process in PIDFILE alive and called NAME?
  local pid
  [ -s "$2" ] || return 1
  pid=$(cat "$2")
  [ "$(cat "/proc/$pid/comm" 2>/dev/null)" = "$1" ]
}

show_logs() {  # on failure, the daemon logs say why
  for f in "$LOGDIR"/*.log "$LOGDIR"/mariadb.out; do
    [ -s "$f" ] && { echo "---- tail $f"; tail -n 20 "$f"; }
  done
  return 0
}
trap 'echo "slurm-up: failed (line $LINENO)" >&2; show_logs >&2' ERR

[ "$(id -u)" = 0 ] || { echo "slurm-up: must run as root (installs packages, starts daemons)" >&2; exit 1; }
for d in "munged /run/munge/munged.pid" "mariadbd /run/mysqld/mysqld.pid" "slurmdbd /run/slurmdbd.pid" \
         "slurmctld /run/slurmctld.pid" "slurmd /run/slurmd.pid"; do
  # shellcheck disable=SC2086
  if running $d; then
    echo "slurm-up: ${d%% *} is already running; run .ci/slurm-down.sh first" >&2
    exit 1
  fi
done

# ------------------------------------------------------------------------------------ packages
log "installing packages"
export DEBIAN_FRONTEND=noninteractive
apt-get update -qq
apt-get install -y -qq --no-install-recommends \
  munge slurmctld slurmd slurm-client slurmdbd mariadb-server >/dev/null

# ------------------------------------------------------------------------------------ munge
log "starting munged"
[ -s /etc/munge/munge.key ] || mungekey --create
chown munge:munge /etc/munge/munge.key
chmod 0400 /etc/munge/munge.key
install -d -o munge -g munge -m 0755 /run/munge
runuser -u munge -- /usr/sbin/munged          # daemonises; pid file /run/munge/munged.pid
wait_for 10 "munge credentials" sh -c 'munge -n | unmunge'

# ------------------------------------------------------------------------------------ slurm.conf
CPUS=$(nproc)
MEM_TOTAL_MB=$(( $(awk '/^MemTotal:/ {print $2}' /proc/meminfo) / 1024 ))
# leave 1 GB to the system on machines that have it
MEM_MB=$(( MEM_TOTAL_MB > 2048 ? MEM_TOTAL_MB - 1024 : MEM_TOTAL_MB / 2 ))
install -d -o slurm -g slurm /var/spool/slurmctld "$LOGDIR"
install -d /var/spool/slurmd /etc/slurm
cat > /etc/slurm/slurm.conf <<EOF
# written by wetpath .ci/slurm-up.sh: one node (this machine), one partition
ClusterName=$CLUSTER
SlurmctldHost=localhost
SlurmUser=slurm
AuthType=auth/munge
StateSaveLocation=/var/spool/slurmctld
SlurmdSpoolDir=/var/spool/slurmd
SlurmctldPidFile=/run/slurmctld.pid
SlurmdPidFile=/run/slurmd.pid
SlurmctldLogFile=$LOGDIR/slurmctld.log
SlurmdLogFile=$LOGDIR/slurmd.log
MailProg=/bin/true
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
MpiDefault=none
SelectType=select/cons_tres
SelectTypeParameters=CR_Core_Memory
SchedulerType=sched/backfill
ReturnToService=2
MinJobAge=300
AccountingStorageType=accounting_storage/slurmdbd
AccountingStorageHost=localhost
AccountingStorageEnforce=associations
JobAcctGatherType=jobacct_gather/linux
NodeName=localhost NodeAddr=127.0.0.1 CPUs=$CPUS RealMemory=$MEM_MB State=UNKNOWN
PartitionName=$PARTITION Nodes=ALL Default=YES MaxTime=INFINITE State=UP
EOF

# ------------------------------------------------------------------------------------ accounting
log "starting mariadbd"
install -d -o mysql -g mysql /run/mysqld
nohup /usr/sbin/mariadbd --user=mysql --bind-address=127.0.0.1 --pid-file=/run/mysqld/mysqld.pid \
  --innodb-buffer-pool-size=256M --innodb-lock-wait-timeout=900 \
  >"$LOGDIR/mariadb.out" 2>&1 &
wait_for 60 "mariadbd" mariadb-admin ping
# a fresh password on every bring-up; the database user is reachable from localhost only
DB_PASS=$(od -An -N12 -tx1 /dev/urandom | tr -d ' \n')
mariadb -e "CREATE OR REPLACE USER 'slurm'@'localhost' IDENTIFIED BY '$DB_PASS';
            GRANT ALL ON slurm_acct_db.* TO 'slurm'@'localhost'; FLUSH PRIVILEGES;"
cat > /etc/slurm/slurmdbd.conf <<EOF
AuthType=auth/munge
DbdHost=localhost
SlurmUser=slurm
LogFile=$LOGDIR/slurmdbd.log
PidFile=/run/slurmdbd.pid
StorageType=accounting_storage/mysql
StorageHost=localhost
StorageLoc=slurm_acct_db
StorageUser=slurm
StoragePass=$DB_PASS
EOF
chown slurm:slurm /etc/slurm/slurmdbd.conf
chmod 0600 /etc/slurm/slurmdbd.conf           # slurmdbd refuses a readable config

log "starting slurmdbd"
/usr/sbin/slurmdbd                            # daemonises; pid file /run/slurmdbd.pid
wait_for 60 "slurmdbd" sacctmgr -n show cluster
sacctmgr -i add cluster "$CLUSTER" >/dev/null 2>&1 || true       # exists already on a rerun
# the plugin validates slurm_account with sacctmgr, and AccountingStorageEnforce needs the association
sacctmgr -i add account "$ACCOUNT" cluster="$CLUSTER" description="wetpath CI" >/dev/null 2>&1 || true
sacctmgr -i add user root account="$ACCOUNT" cluster="$CLUSTER" >/dev/null 2>&1 || true
sacctmgr -n -P show association where user=root account="$ACCOUNT" format=cluster,account,user \
  | grep -q "^$CLUSTER|$ACCOUNT|root$" \
  || { echo "slurm-up: association root/$ACCOUNT missing in accounting" >&2; exit 1; }

# ------------------------------------------------------------------------------------ slurm daemons
log "starting slurmctld and slurmd"
/usr/sbin/slurmctld -c                        # -c: no jobs carried over from an earlier bring-up
/usr/sbin/slurmd -N localhost
wait_for 60 "node localhost idle" sh -c "sinfo -h -N -o %T | grep -qx idle"

# ------------------------------------------------------------------------------------ smoke test
log "smoke test"
sinfo
srun -A "$ACCOUNT" -N1 -n1 -t 1 hostname
jid=$(sbatch --parsable -A "$ACCOUNT" -t 1 -o /dev/null --wrap 'sleep 1')
wait_for 60 "job $jid completed" sh -c "squeue -h -t all -j $jid -o %T | grep -qx COMPLETED"
wait_for 30 "job $jid in accounting" sh -c "sacct -n -X -j $jid -o State | grep -q COMPLETED"
sacct -X -j "$jid" -o JobID,JobName,Account,State,ExitCode,Elapsed
log "cluster ready: partition=$PARTITION account=$ACCOUNT cpus=$CPUS mem=${MEM_MB}M"
