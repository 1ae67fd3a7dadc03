#!/bin/bash
#SBATCH --job-name=sinew-cohort
#SBATCH --array=1-8
#SBATCH --cpus-per-task=4
#SBATCH --mem=4G
#SBATCH --time=02:00:00
# Array task K runs share K of N of the pairs, N = the array's size. To rerun some shards
# only, say N: sbatch --array=3 --export=ALL,SHARDS=8 cohort_array.sh
set -euo pipefail
sinew cohort --manifest cohort.toml --out runs/shard_${SLURM_ARRAY_TASK_ID} \
    --preset default --threads ${SLURM_CPUS_PER_TASK} -q \
    --shard ${SLURM_ARRAY_TASK_ID}/${SHARDS:-${SLURM_ARRAY_TASK_COUNT}}
