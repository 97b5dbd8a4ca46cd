#!/usr/bin/env bash
# slurm-local.sh — a single-node Slurm cluster on localhost, for cairn's tests and CI.
#
#   eval "$(scripts/slurm-local.sh up)"   # start; stdout is only: export SLURM_CONF=…
#   scripts/slurm-local.sh status         # "up SLURM_CONF=…" (exit 0) or "down" (exit 3)
#   scripts/slurm-local.sh down           # cancel jobs, stop what `up` started (by PID), remove the folder
#
# It starts, from Debian's packages (slurm-wlm, munge), a private munged (as the munge
# user, own key and socket), slurmctld and slurmd (as root), all configured and logging
# inside one temporary folder. No systemd is used and no system file is changed, except
# that `up` installs the two packages with apt-get when they are missing and it runs as root.
# See scripts/slurm-local.md.
#
# Environment (all optional):
#   CAIRN_SLURM_DIR      the temporary folder   [/tmp/cairn-slurm-<uid>]
#   CAIRN_SLURM_CTLD_PORT, CAIRN_SLURM_SLURMD_PORT   TCP ports on 127.0.0.1 [6817, 6818]
#   CAIRN_SLURM_TIMEOUT  seconds `up` waits for the node to be idle, and for the probe job [30]
#   CAIRN_SLURM_PROBE    1: `up` runs one job (named slurm-local-probe) before returning; 0: not [1]
set -euo pipefail

PROG=slurm-local
DIR=${CAIRN_SLURM_DIR:-/tmp/cairn-slurm-$(id -u)}
DIR=${DIR%/}
CONF=$DIR/etc/slurm.conf
MARKER=$DIR/.cairn-slurm-local
CTLD_PORT=${CAIRN_SLURM_CTLD_PORT:-6817}
SLURMD_PORT=${CAIRN_SLURM_SLURMD_PORT:-6818}
TIMEOUT=${CAIRN_SLURM_TIMEOUT:-30}
PROBE=${CAIRN_SLURM_PROBE:-1}
MUNGE_SOCKET=$DIR/munge/munge.socket.2

log() { printf '%s: %s\n' "$PROG" "$*" >&2; }
die() { printf '%s: error: %s\n' "$PROG" "$*" >&2; exit 1; }
now() { date +%s.%N; }
elapsed() { awk -v a="$1" -v b="$(now)" 'BEGIN { printf "%.1f", b - a }'; }

usage() {
  cat >&2 <<EOF
usage: $0 up|down|status
  up      start munged, slurmctld and slurmd on localhost; prints only 'export SLURM_CONF=…' on stdout
  down    cancel the jobs, stop the daemons that 'up' started (by PID) and remove $DIR
  status  print 'up SLURM_CONF=…' (exit 0) or 'down' (exit 3)
EOF
}

check_settings() {
  case $DIR in
    /*) ;;
    *) die "CAIRN_SLURM_DIR must be an absolute path, got '$DIR'" ;;
  esac
  [[ $DIR != / && $DIR != /tmp ]] || die "CAIRN_SLURM_DIR must be a folder of its own, got '$DIR'"
  local name value
  for name in CTLD_PORT SLURMD_PORT TIMEOUT; do
    value=${!name}
    [[ $value =~ ^[0-9]{1,5}$ && $value -gt 0 ]] \
      || die "CAIRN_SLURM_$name must be a whole number from 1 to 99999, got '$value'"
  done
  ((CTLD_PORT <= 65535 && SLURMD_PORT <= 65535)) \
    || die "the ports must be at most 65535, got CAIRN_SLURM_CTLD_PORT=$CTLD_PORT CAIRN_SLURM_SLURMD_PORT=$SLURMD_PORT"
  [[ $PROBE == 0 || $PROBE == 1 ]] || die "CAIRN_SLURM_PROBE must be 0 or 1, got '$PROBE'"
  [[ $CTLD_PORT != "$SLURMD_PORT" ]] \
    || die "CAIRN_SLURM_CTLD_PORT and CAIRN_SLURM_SLURMD_PORT must differ, both are $CTLD_PORT"
}

# Serialise up and down of the same folder (e.g. parallel test workers) with a lock on the
# folder that holds $DIR (/tmp by default), so that no lock file is left behind. The lock's
# descriptor (9) is closed for every daemon started below, or they would keep it.
take_lock() {
  local parent=${DIR%/*}
  [[ -n $parent ]] || parent=/
  [[ -d $parent ]] || die "the folder that should hold CAIRN_SLURM_DIR does not exist: '$parent'"
  exec 9<"$parent"
  flock -w 120 9 || die "could not lock $parent within 120 s (another '$0 up' or 'down' is still running?)"
}

# ---- processes -------------------------------------------------------------

# pid_of NAME: the PID in $DIR/run/NAME.pid if that process is alive, is NAME, and was
# started for this folder (its command line names $DIR); empty otherwise.
pid_of() {
  local name=$1 file=$DIR/run/$1.pid pid
  [[ -r $file ]] || return 0
  pid=$(tr -dc '0-9' <"$file")
  [[ -n $pid ]] && running "$pid" || return 0
  [[ $(cat "/proc/$pid/comm" 2>/dev/null) == "$name" ]] || return 0
  tr '\0' ' ' <"/proc/$pid/cmdline" 2>/dev/null | grep -qF -- "$DIR" || return 0
  echo "$pid"
}

# The slurmstepd processes of this cluster's jobs (left running when slurmd stops). Their
# environment is overwritten by their title, so they are known by their working folder
# ($DIR/log, slurmd's) or an open file (slurmd.log) inside $DIR.
stepd_pids() {
  local p f
  for p in /proc/[0-9]*; do
    [[ $(cat "$p/comm" 2>/dev/null) == slurmstepd ]] || continue
    for f in "$p/cwd" "$p"/fd/*; do
      if [[ $(readlink "$f" 2>/dev/null) == "$DIR"/* ]]; then
        echo "${p#/proc/}"
        break
      fi
    done
  done
}

# descendants PID...: every process below the given ones (children first found, any depth).
descendants() {
  local -A kids=()
  local f rest ppid pid queue=("$@")
  for f in /proc/[0-9]*/stat; do
    rest=$(cat "$f" 2>/dev/null) || continue
    pid=${rest%% *}
    rest=${rest##*) } # after the command name, which may hold spaces and parentheses
    ppid=$(awk '{ print $2 }' <<<"$rest")
    kids[$ppid]+="$pid "
  done
  while [[ ${#queue[@]} -gt 0 ]]; do
    pid=${queue[0]}
    queue=("${queue[@]:1}")
    for f in ${kids[$pid]:-}; do
      echo "$f"
      queue+=("$f")
    done
  done
}

# running PID: the process exists and is not a zombie (a daemon's parent here may be an
# init that reaps late, so an exited daemon can linger as a zombie for a while).
running() {
  local st
  st=$(sed -n 's/^State:[[:space:]]*\([A-Z]\).*/\1/p' "/proc/$1/status" 2>/dev/null) || return 1
  [[ -n $st && $st != Z && $st != X ]]
}

# stop_pids LABEL PID...: TERM, wait up to 10 s, then KILL.
stop_pids() {
  local label=$1 i p left
  shift
  [[ $# -gt 0 ]] || return 0
  kill -TERM "$@" 2>/dev/null || true
  for ((i = 0; i < 100; i++)); do
    left=()
    for p in "$@"; do running "$p" && left+=("$p"); done
    [[ ${#left[@]} -eq 0 ]] && { log "stopped $label (PID $*)"; return 0; }
    sleep 0.1
  done
  log "$label (PID ${left[*]}) did not stop on TERM within 10 s; sending KILL"
  kill -KILL "${left[@]}" 2>/dev/null || true
  sleep 0.2
}

port_in_use() { (exec 3<>"/dev/tcp/127.0.0.1/$1") 2>/dev/null; }

# ---- status ----------------------------------------------------------------

# state: "up" (all three daemons alive), "down" (none), or "partial".
state() {
  local n=0 name
  for name in munged slurmctld slurmd; do
    [[ -n $(pid_of "$name") ]] && n=$((n + 1))
  done
  if ((n == 3)); then echo up; elif ((n == 0)); then echo down; else echo partial; fi
}

cmd_status() {
  check_settings
  case $(state) in
    up)
      local node
      node=$(SLURM_CONF=$CONF timeout 10 sinfo -h -N -o '%N %T' 2>/dev/null | head -1 || true)
      echo "up SLURM_CONF=$CONF"
      log "munged $(pid_of munged), slurmctld $(pid_of slurmctld), slurmd $(pid_of slurmd); node: ${node:-no answer from sinfo}"
      ;;
    partial)
      echo down
      log "only some daemons of $DIR are running (munged '$(pid_of munged)', slurmctld '$(pid_of slurmctld)', slurmd '$(pid_of slurmd)'); run '$0 down'"
      return 3
      ;;
    *)
      echo down
      return 3
      ;;
  esac
}

# ---- up --------------------------------------------------------------------

ensure_packages() {
  local missing=() cmd
  for cmd in munged mungekey munge unmunge slurmctld slurmd sinfo sbatch scontrol; do
    command -v "$cmd" >/dev/null 2>&1 || PATH=$PATH:/usr/sbin:/sbin command -v "$cmd" >/dev/null 2>&1 || missing+=("$cmd")
  done
  [[ ${#missing[@]} -eq 0 ]] && return 0
  [[ $(id -u) -eq 0 ]] || die "missing ${missing[*]}; install them with: apt-get install -y --no-install-recommends slurm-wlm munge"
  log "missing ${missing[*]}: installing slurm-wlm and munge with apt-get"
  export DEBIAN_FRONTEND=noninteractive
  if ! apt-get install -y --no-install-recommends slurm-wlm munge >&2 9>&-; then
    log "apt-get install failed; running apt-get update and trying again"
    apt-get update >&2 9>&- && apt-get install -y --no-install-recommends slurm-wlm munge >&2 9>&- \
      || die "could not install slurm-wlm and munge with apt-get"
  fi
}

write_conf() {
  local host=$1 cpus mem
  cpus=$(nproc)
  # RealMemory as slurmd measures it (MB), so the node is never refused for having less.
  mem=$(slurmd -C 2>/dev/null | sed -n 's/.*RealMemory=\([0-9]*\).*/\1/p' | head -1 || true)
  [[ -n $mem ]] || mem=$(awk '/^MemTotal:/ { printf "%d", $2 / 1024 }' /proc/meminfo)
  cat >"$CONF" <<EOF
# Written by scripts/slurm-local.sh for a single-node test cluster; removed by 'down'.
ClusterName=cairn
SlurmctldHost=$host(127.0.0.1)
SlurmctldPort=$CTLD_PORT
SlurmdPort=$SLURMD_PORT
AuthType=auth/munge
CredType=cred/munge
AuthInfo=socket=$MUNGE_SOCKET
SlurmUser=root
SlurmdUser=root
StateSaveLocation=$DIR/state
SlurmdSpoolDir=$DIR/spool
SlurmctldPidFile=$DIR/run/slurmctld.pid
SlurmdPidFile=$DIR/run/slurmd.pid
SlurmctldLogFile=$DIR/log/slurmctld.log
SlurmdLogFile=$DIR/log/slurmd.log
SlurmctldDebug=info
SlurmdDebug=info
MpiDefault=none
SwitchType=switch/none
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
SelectType=select/cons_tres
SelectTypeParameters=CR_CPU
SchedulerType=sched/backfill
SchedulerParameters=batch_sched_delay=0
AccountingStorageType=accounting_storage/none
JobAcctGatherType=jobacct_gather/none
JobCompType=jobcomp/none
MailProg=/bin/true
ReturnToService=2
SlurmdParameters=config_overrides
SlurmctldTimeout=10
SlurmdTimeout=10
MessageTimeout=5
InactiveLimit=0
KillWait=2
Waittime=0
MinJobAge=300
NodeName=$host NodeAddr=127.0.0.1 CPUs=$cpus RealMemory=$mem State=UNKNOWN
PartitionName=local Nodes=$host Default=YES MaxTime=INFINITE State=UP
EOF
}

start_munged() {
  id munge >/dev/null 2>&1 || die "there is no 'munge' user; is the munge package installed? (apt-get install -y --no-install-recommends munge)"
  local key=$DIR/munge/munge.key
  install -d -o munge -g munge -m 0755 "$DIR/munge"
  if [[ ! -s $key ]]; then
    if command -v mungekey >/dev/null 2>&1; then
      mungekey --create --keyfile="$key" >&2 9>&-
    else # munge before 0.5.14 has no mungekey: 1024 random bytes, as its create-munge-key wrote
      dd if=/dev/urandom of="$key" bs=1024 count=1 status=none
    fi
  fi
  chown munge:munge "$key"
  chmod 0600 "$key"
  # munged (as munge) appends to its log, which lives with the others in root's log folder.
  install -o munge -g munge -m 0640 /dev/null "$DIR/log/munged.log"
  runuser -u munge -- munged \
    --socket="$MUNGE_SOCKET" --key-file="$key" \
    --pid-file="$DIR/munge/munged.pid" --log-file="$DIR/log/munged.log" \
    --seed-file="$DIR/munge/munged.seed" \
    </dev/null >>"$DIR/log/munged.out" 2>&1 9>&- \
    || die "munged did not start; see $DIR/log/munged.log and $DIR/log/munged.out: $(tail -n 5 "$DIR/log/munged.out" "$DIR/log/munged.log" 2>/dev/null | tr '\n' ' ')"
  local i
  for ((i = 0; i < 50; i++)); do
    if munge -n -S "$MUNGE_SOCKET" 2>/dev/null | unmunge -S "$MUNGE_SOCKET" >/dev/null 2>&1; then
      cp "$DIR/munge/munged.pid" "$DIR/run/munged.pid"
      log "munged up (PID $(cat "$DIR/run/munged.pid"), socket $MUNGE_SOCKET)"
      return 0
    fi
    sleep 0.1
  done
  die "munged does not answer on $MUNGE_SOCKET after 5 s; see $DIR/log/munged.log"
}

# start_daemon NAME: slurmctld or slurmd, daemonised by itself, with no tie to our stdout,
# stderr or lock (so that "\$(… up)" returns at once).
start_daemon() {
  local name=$1
  SLURM_CONF=$CONF "$name" -f "$CONF" \
    </dev/null >>"$DIR/log/$name.out" 2>&1 9>&- \
    || return 1
  local i
  for ((i = 0; i < 50; i++)); do
    [[ -n $(pid_of "$name") ]] && { log "$name up (PID $(pid_of "$name"))"; return 0; }
    sleep 0.1
  done
  return 1
}

fail_up() {
  local what=$1 f
  log "error: $what"
  for f in "$DIR"/log/*; do
    [[ -s $f ]] || continue
    log "---- last lines of $f"
    tail -n 15 "$f" >&2
  done
  stop_all
  die "$what; the daemons were stopped; logs are kept in $DIR/log/ (slurmctld.log, slurmd.log, munged.log, *.out) until '$0 down'"
}

# A first job, so that `up` returns only once the whole path (munge credentials, scheduler,
# slurmd, slurmstepd) runs jobs; slurmctld's scheduler starts about 3 s after slurmctld does.
probe_job() {
  local id st="" deadline
  id=$(cd "$DIR" && SLURM_CONF=$CONF timeout 10 sbatch --parsable -J slurm-local-probe \
    -o /dev/null -e /dev/null --wrap true 2>&1) || fail_up "sbatch of the probe job failed: $id"
  [[ $id =~ ^[0-9]+$ ]] || fail_up "sbatch of the probe job answered '$id', not a job id"
  deadline=$(($(date +%s) + TIMEOUT))
  while :; do
    st=$(SLURM_CONF=$CONF timeout 5 scontrol show job "$id" 2>/dev/null | sed -n 's/.*JobState=\([A-Z_]*\).*/\1/p' || true)
    case $st in
      COMPLETED) break ;;
      PENDING | CONFIGURING | RUNNING | COMPLETING | "") ;;
      *) fail_up "the probe job $id ended $st, not COMPLETED" ;;
    esac
    (($(date +%s) < deadline)) || fail_up "the probe job $id is still '${st:-unknown}' after $TIMEOUT s"
    sleep 0.1
  done
  log "probe job $id completed"
}

cmd_up() {
  check_settings
  local t0 st
  t0=$(now)
  take_lock
  st=$(state)
  if [[ $st == up ]]; then
    log "already up ($DIR); not starting a second cluster"
    echo "export SLURM_CONF=$CONF"
    return 0
  fi
  [[ $st == partial ]] && die "a previous cluster in $DIR is only partly running (munged '$(pid_of munged)', slurmctld '$(pid_of slurmctld)', slurmd '$(pid_of slurmd)'); run '$0 down' first"
  if [[ -e $DIR || -L $DIR ]]; then
    [[ -d $DIR && ! -L $DIR && -e $MARKER ]] \
      || die "$DIR exists and was not made by this script; remove it or set CAIRN_SLURM_DIR to another folder"
    log "removing the stopped cluster's folder $DIR"
    rm -rf -- "$DIR"
  fi
  [[ $(id -u) -eq 0 ]] || die "must run as root (slurmd runs jobs as their users and munged as 'munge'); running as $(id -un)"
  ensure_packages
  local port
  for port in "$CTLD_PORT" "$SLURMD_PORT"; do
    port_in_use "$port" && die "TCP port $port on 127.0.0.1 is already in use (another slurmctld/slurmd?); stop it or set CAIRN_SLURM_CTLD_PORT / CAIRN_SLURM_SLURMD_PORT"
  done

  mkdir -p -m 0755 "$DIR"
  : >"$MARKER"
  mkdir -p -m 0755 "$DIR/etc" "$DIR/log" "$DIR/run" "$DIR/state" "$DIR/spool"
  local host
  host=$(hostname -s 2>/dev/null || hostname)
  [[ $host =~ ^[A-Za-z0-9][A-Za-z0-9.-]*$ ]] || die "the host name '$host' is not usable as a Slurm node name"
  write_conf "$host"
  log "starting a single-node cluster in $DIR (node $host, $(nproc) CPUs, ports $CTLD_PORT/$SLURMD_PORT)"

  start_munged
  start_daemon slurmctld || fail_up "slurmctld did not start"
  start_daemon slurmd || fail_up "slurmd did not start"

  local deadline node_state=""
  deadline=$(($(date +%s) + TIMEOUT))
  while :; do
    node_state=$(SLURM_CONF=$CONF timeout 5 sinfo -h -N -n "$host" -o '%T' 2>/dev/null | head -1 || true)
    [[ $node_state == idle ]] && break
    [[ -n $(pid_of slurmctld) ]] || fail_up "slurmctld exited while starting"
    [[ -n $(pid_of slurmd) ]] || fail_up "slurmd exited while starting"
    (($(date +%s) < deadline)) || fail_up "node $host not idle after $TIMEOUT s (last state: '${node_state:-no answer}')"
    sleep 0.2
  done
  log "node $host idle after $(elapsed "$t0") s"
  [[ $PROBE == 0 ]] || probe_job
  log "cluster up in $(elapsed "$t0") s"
  echo "export SLURM_CONF=$CONF"
}

# ---- down ------------------------------------------------------------------

# Cancel the jobs and stop every process of this cluster, by PID.
stop_all() {
  local ctld ids i
  ctld=$(pid_of slurmctld)
  if [[ -n $ctld ]]; then
    ids=$(SLURM_CONF=$CONF timeout 10 squeue -h -o '%A' 2>/dev/null | sort -u | tr '\n' ' ' || true)
    if [[ -n ${ids// /} ]]; then
      log "cancelling jobs: $ids"
      # shellcheck disable=SC2086
      SLURM_CONF=$CONF timeout 10 scancel $ids 2>/dev/null || true
      for ((i = 0; i < 50; i++)); do
        [[ -z $(SLURM_CONF=$CONF timeout 5 squeue -h -t RUNNING,COMPLETING,SUSPENDED -o '%A' 2>/dev/null || true) ]] && break
        sleep 0.1
      done
    fi
  fi
  # shellcheck disable=SC2046
  stop_pids slurmd $(pid_of slurmd)
  # Normally no slurmstepd is left once the jobs are cancelled. One that is (slurmctld was
  # gone, so nothing cancelled its job) ignores TERM: KILL it and its job's processes.
  local stepds=() jobs=()
  mapfile -t stepds < <(stepd_pids)
  if [[ ${#stepds[@]} -gt 0 ]]; then
    mapfile -t jobs < <(descendants "${stepds[@]}")
    log "killing the slurmstepd left running (PID ${stepds[*]}) and their job processes (PID ${jobs[*]:-none})"
    kill -KILL "${stepds[@]}" "${jobs[@]}" 2>/dev/null || true
    sleep 0.2
  fi
  # shellcheck disable=SC2086
  stop_pids slurmctld $ctld
  # shellcheck disable=SC2046
  stop_pids munged $(pid_of munged)
}

cmd_down() {
  check_settings
  local t0
  t0=$(now)
  take_lock
  if [[ ! -e $DIR && ! -L $DIR ]]; then
    log "not up (no $DIR)"
    return 0
  fi
  [[ -d $DIR && ! -L $DIR && -e $MARKER ]] \
    || die "$DIR was not made by this script; not touching it"
  stop_all
  rm -rf -- "$DIR"
  log "down in $(elapsed "$t0") s; removed $DIR"
}

case ${1:-} in
  up) cmd_up ;;
  down) cmd_down ;;
  status) cmd_status ;;
  -h | --help | help) usage ;;
  *)
    usage
    die "unknown command '${1:-}'; expected up, down or status"
    ;;
esac
