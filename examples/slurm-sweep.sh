#!/usr/bin/env bash
# A sweep spread over a Slurm job array, then merged by a dependent job. Submit with:
#     bash examples/slurm-sweep.sh
# Each array task runs one shard (`--shard auto` reads SLURM_ARRAY_TASK_ID and SLURM_ARRAY_TASK_COUNT); the
# merge job starts once every task has finished (afterok). The sbatch options are from memory of the sbatch
# manual; adapt partition and time limits to your site.
set -euo pipefail
SCENARIO=${SCENARIO:-scenarios/studio-interface.toml}
TASKS=${TASKS:-8}
OUT=${OUT:-out/cluster-sweep}
mkdir -p "$OUT"

array_id=$(sbatch --parsable --array=1-"$TASKS" --job-name=convchain-sweep \
    --output="$OUT/task-%a.log" --wrap "convchain sweep $SCENARIO \
        --vary 'source.frequency=100 Hz..15 kHz' --log --points 200 \
        --shard auto --out $OUT/shard-\$SLURM_ARRAY_TASK_ID --threads \${SLURM_CPUS_PER_TASK:-1} --quiet")

sbatch --dependency=afterok:"$array_id" --job-name=convchain-merge --output="$OUT/merge.log" \
    --wrap "convchain merge $OUT/shard-* --out $OUT/merged"
echo "submitted array job $array_id ($TASKS tasks) and its merge; results in $OUT/merged"
