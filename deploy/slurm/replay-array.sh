#!/bin/bash
# Replay an archive of days on a Slurm cluster: one array task per shard, then a merge job that
# starts only when every task succeeded (afterok).
#
#   NEPHOCAST_SITE=/data/site.toml NEPHOCAST_DAYS=/data/days NEPHOCAST_OUT=/data/replay \
#     NEPHOCAST_SHARDS=16 deploy/slurm/replay-array.sh submit
#
# submits the array (tasks 0 … NEPHOCAST_SHARDS−1) and the dependent merge job. Each task runs
#   nephocast replay --batch --shard K/N --out $NEPHOCAST_OUT/shard-K
# with K = SLURM_ARRAY_TASK_ID − SLURM_ARRAY_TASK_MIN (0-based) and N = SLURM_ARRAY_TASK_COUNT;
# the merge job writes $NEPHOCAST_OUT/merged. A task that is killed or fails can be resubmitted:
# its completed days are skipped.
#
# Environment:
#   NEPHOCAST_BIN           the nephocast binary (default: nephocast on PATH)
#   NEPHOCAST_SITE          the site file (required)
#   NEPHOCAST_DAYS          a folder of day folders, or a list file (required)
#   NEPHOCAST_OUT           the output root (required)
#   NEPHOCAST_SHARDS        shards for `submit` and `merge` (default 8)
#   NEPHOCAST_MEASUREMENTS  optional measurements CSV for all days
#
# Modes (first argument): submit | task | merge. Without one, `task` inside an array job.
#SBATCH --job-name=nephocast-replay
#SBATCH --cpus-per-task=2
#SBATCH --mem=4G
#SBATCH --time=24:00:00
#SBATCH --output=nephocast-replay-%A_%a.log
set -euo pipefail

bin=${NEPHOCAST_BIN:-nephocast}
: "${NEPHOCAST_SITE:?set NEPHOCAST_SITE to the site file}"
: "${NEPHOCAST_DAYS:?set NEPHOCAST_DAYS to the folder of days (or a list file)}"
: "${NEPHOCAST_OUT:?set NEPHOCAST_OUT to the output root}"
shards=${NEPHOCAST_SHARDS:-8}
mode=${1:-}
if [[ -z $mode ]]; then
    if [[ -n ${SLURM_ARRAY_TASK_ID:-} ]]; then mode=task; else mode=submit; fi
fi
measurements=()
if [[ -n ${NEPHOCAST_MEASUREMENTS:-} ]]; then
    measurements=(--measurements "$NEPHOCAST_MEASUREMENTS")
fi

case $mode in
submit)
    # sbatch reads this file's #SBATCH lines; the script runs again inside each task.
    array_job=$(sbatch --parsable --array="0-$((shards - 1))" --export=ALL "$0" task)
    array_job=${array_job%%;*}
    sbatch --parsable --dependency="afterok:${array_job}" --job-name=nephocast-merge \
        --output=nephocast-merge-%j.log --export=ALL "$0" merge
    ;;
task)
    : "${SLURM_ARRAY_TASK_ID:?task mode runs inside a Slurm array job (SLURM_ARRAY_TASK_ID unset)}"
    : "${SLURM_ARRAY_TASK_COUNT:?SLURM_ARRAY_TASK_COUNT unset}"
    k=$((SLURM_ARRAY_TASK_ID - ${SLURM_ARRAY_TASK_MIN:-0}))
    n=$SLURM_ARRAY_TASK_COUNT
    exec "$bin" replay --batch --quiet --site "$NEPHOCAST_SITE" --frames "$NEPHOCAST_DAYS" \
        "${measurements[@]}" --shard "$k/$n" --out "$NEPHOCAST_OUT/shard-$k"
    ;;
merge)
    dirs=()
    for ((k = 0; k < shards; k++)); do dirs+=("$NEPHOCAST_OUT/shard-$k"); done
    exec "$bin" merge --out "$NEPHOCAST_OUT/merged" "${dirs[@]}"
    ;;
*)
    echo "usage: $0 [submit|task|merge]" >&2
    exit 2
    ;;
esac
