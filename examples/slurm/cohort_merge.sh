#!/bin/bash
#SBATCH --job-name=sinew-merge
#SBATCH --mem=1G
#SBATCH --time=00:10:00
# Joins the shards' tables: runs/all/scores.csv, summary.md, summary.json.
set -euo pipefail
sinew cohort merge runs/shard_* --out runs/all
