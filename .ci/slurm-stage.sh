#!/usr/bin/env bash
# CI stage: stand up a real SLURM cluster on localhost, run the workflow once locally and once
# through snakemake-executor-plugin-slurm, check that the CSV results are equal, tear down.
#
#   bash .ci/slurm-stage.sh [extra snakemake arguments, given to both runs]
#
# Environment (all optional):
#   WETPATH_VENV          venv holding wetpath and snakemake (default: <repo>/.venv); the SLURM
#                         executor plugin is installed into it when missing
#   SLURM_STAGE_SNAKEFILE workflow to run         (default: <repo>/Snakefile)
#   SLURM_STAGE_CONFIG    its config file         (default: <repo>/config/config.yaml)
#   SLURM_STAGE_TIMEOUT   seconds for both runs   (default: 1200); then SIGINT, SIGKILL 60 s later
#   SLURM_STAGE_COMPARE_ARGS  extra options of scripts/compare_runs.py, e.g.
#                         "--ignore-column elapsed_s --exclude provenance/*.csv" (split at spaces, no quoting)
#   SLURM_CI_*            see .ci/slurm-up.sh
# Needs root and Debian 12 (installs slurm, munge and MariaDB packages). Every daemon it starts is
# stopped on exit, also after a failure or the time limit (.ci/slurm-down.sh, by pid file).
set -euo pipefail

REPO=$(cd "$(dirname "$0")/.." && pwd)
VENV=${WETPATH_VENV:-$REPO/.venv}
SNAKEFILE=${SLURM_STAGE_SNAKEFILE:-$REPO/Snakefile}
CONFIG=${SLURM_STAGE_CONFIG:-$REPO/config/config.yaml}
LIMIT=${SLURM_STAGE_TIMEOUT:-1200}
read -r -a COMPARE_ARGS <<< "${SLURM_STAGE_COMPARE_ARGS:-}"
PLUGIN='snakemake-executor-plugin-slurm>=2.8,<3'

log() { echo "== slurm stage [$(date -u +%T), ${SECONDS}s] $*"; }

[ -x "$VENV/bin/python" ] || { echo "slurm stage: no venv at $VENV (set WETPATH_VENV)" >&2; exit 2; }
for f in "$SNAKEFILE" "$CONFIG"; do
  [ -f "$f" ] || { echo "slurm stage: $f: not found" >&2; exit 2; }
done

WORK=$(mktemp -d "${TMPDIR:-/tmp}/wetpath-slurm.XXXXXX")
# shellcheck disable=SC2317  # (called by the trap)
finish() {
  local rc=$?
  if [ "$rc" != 0 ]; then
    # the job logs live in the run directory; show them while they exist
    find "$WORK/runs/slurm/.snakemake/slurm_logs" -name '*.log' 2>/dev/null | sort | while read -r f; do
      echo "---- SLURM job log $f"; tail -n 40 "$f"
    done
  fi
  log "teardown"
  bash "$REPO/.ci/slurm-down.sh" || true
  if [ "$rc" = 0 ]; then rm -rf "$WORK"; else echo "slurm stage: failed ($rc); runs kept in $WORK"; fi
  log "done (exit $rc)"
  exit "$rc"
}
trap finish EXIT
trap 'exit 130' INT TERM

SECONDS=0
log "bring-up"
bash "$REPO/.ci/slurm-up.sh"
log "cluster up"

if ! "$VENV/bin/python" -c 'import snakemake_executor_plugin_slurm' 2>/dev/null; then
  log "installing $PLUGIN into $VENV"
  "$VENV/bin/python" -m pip install -q "$PLUGIN"
fi
"$VENV/bin/python" -m pip list 2>/dev/null | grep -Ei '^(snakemake|snakemake-executor-plugin-slurm) ' || true

# jobs inherit this environment (sbatch exports it): the venv's wetpath and python come first
export PATH="$VENV/bin:$PATH"
log "comparing a local run with a SLURM run (time limit ${LIMIT}s)"
# SIGINT, not SIGTERM: on SIGINT snakemake cancels its SLURM jobs and exits; on SIGTERM it keeps
# waiting for them. -k: SIGKILL if it has not exited 60 s later. timeout runs in its own process
# group, out of reach of Ctrl-C: an interrupted stage passes SIGINT on to it and waits.
timeout -s INT -k 60 "$LIMIT" "$VENV/bin/python" "$REPO/scripts/compare_runs.py" \
  --snakefile "$SNAKEFILE" --configfile "$CONFIG" \
  --profile "$REPO/workflow/profiles/slurm-ci" --workdir "$WORK/runs" ${COMPARE_ARGS[@]+"${COMPARE_ARGS[@]}"} \
  -- "$@" &
RUN_PID=$!
trap 'log "interrupted: stopping the runs"; kill -INT "$RUN_PID" 2>/dev/null; wait "$RUN_PID"; exit 130' INT TERM
rc=0
wait "$RUN_PID" || rc=$?
case $rc in
  0)   log "SLURM results equal the local results" ;;
  124|137) log "time limit of ${LIMIT}s reached" ;;
  *)   log "comparison failed (exit $rc)" ;;
esac
exit "$rc"
