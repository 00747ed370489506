#!/usr/bin/env bash
# foldfarm coordinator as a requeueable SLURM job; the arguments are those of `foldfarm run`:
#   sbatch --time=2-00:00:00 deploy/slurm-coordinator.sh jobs/skua-4x6-cluster.toml --cluster slurm --jobs 16
# (`foldfarm run ... --sbatch FILE` writes this script for one command line.)
#SBATCH --job-name=foldfarm
#SBATCH --requeue
#SBATCH --signal=B:TERM@300
#SBATCH --open-mode=append
#SBATCH --output=%x-%j.out
#SBATCH --ntasks=1
#SBATCH --cpus-per-task=1

# SLURM sends SIGTERM 5 minutes before the walltime (and on preemption); the coordinator then
# stops cleanly and this job requeues itself; started again, it finds its run in the run file and resumes it.
set -uo pipefail
run_file="foldfarm-job-$SLURM_JOB_ID.run"
echo "foldfarm: job $SLURM_JOB_ID start $(( ${SLURM_RESTART_COUNT:-0} + 1 )) on $(hostname) at $(date -Is)"
"${FOLDFARM_PYTHON:-python3}" -m foldfarm run "$@" --run-file "$run_file" &
coordinator=$!
stopping=0
trap 'stopping=1; kill -TERM "$coordinator" 2>/dev/null' TERM
while :; do
    wait "$coordinator"
    status=$?
    kill -0 "$coordinator" 2>/dev/null || break   # wait returned for the signal: the coordinator still stops
done
if [[ $stopping == 1 && $status == 130 ]]; then
    echo "foldfarm: job $SLURM_JOB_ID stopped cleanly; requeued to resume the run of $run_file"
    scontrol requeue "$SLURM_JOB_ID"
fi
exit "$status"
