#!/usr/bin/env bash
# Start one single-threaded Dask worker per allocated core on every node of a SLURM job.
#   sbatch --nodes=8 --ntasks-per-node=64 deploy/slurm-workers.sh tcp://head.halvorsen.example:8786
#SBATCH --job-name=foldfarm-workers
#SBATCH --time=7-00:00:00
set -euo pipefail
scheduler="${1:?usage: slurm-workers.sh SCHEDULER_ADDRESS}"
# Dask's bookkeeping slowed down for long counting tasks (submit from the checkout's top folder).
export DASK_CONFIG="${DASK_CONFIG:-$SLURM_SUBMIT_DIR/deploy/dask.yaml}"
srun --kill-on-bad-exit=0 dask worker "$scheduler" --nthreads 1 --nworkers 1 --no-dashboard \
    --death-timeout 600 --local-directory "${TMPDIR:-/tmp}/foldfarm-$SLURM_JOB_ID"
