#!/bin/bash
# Example SLURM batch script: build a kernel on several nodes with MPI, and carry on after a
# requeue (time limit reached, node failure, preemption).
#
#   sbatch scripts/slurm-build.sh configs/argon-87K-production.toml
#
# How resuming works: every finished task (one temperature x one width: a pressure ladder) is
# a file under <output>/<name>.tasks/ on the shared file system, written atomically. Running
# the same command again skips those and runs the rest; the kernel is assembled from the task
# files only, so it is the same, bit for bit, however often the build was interrupted and on
# however many ranks each part ran. Work lost at an interruption: the tasks running at that
# moment (a task is not checkpointed inside its ladder).
#
# Sizing: the build has one task per (temperature, width), handed out most expensive first
# as ranks become free. Ranks beyond the number of tasks idle, and the build takes at least as
# long as its longest task; ask for at most about a quarter as many ranks as there are tasks
# (benchmarks/README.md, "Scale-out", measured ~90 % or better parallel efficiency from 4
# tasks per rank). `gcmc build CONFIG --plan-only` prints the number of tasks.
#
# Adjust the #SBATCH lines to your site (partition, account, cores per node).

#SBATCH --job-name=gcmc-build
#SBATCH --nodes=2
#SBATCH --ntasks-per-node=32          # one MPI rank per core: the engine is single-threaded
#SBATCH --cpus-per-task=1
#SBATCH --mem-per-cpu=1G              # a rank stays well below 1 GB (benchmarks/README.md)
#SBATCH --time=12:00:00
#SBATCH --requeue                     # SLURM may requeue the job (node failure, preemption)
#SBATCH --signal=B:USR1@600           # and tells this script 10 min before the time limit
#SBATCH --open-mode=append            # a requeued run appends to the same output file
#SBATCH --output=gcmc-build-%j.out

set -uo pipefail

CONFIG=${1:?usage: sbatch scripts/slurm-build.sh CONFIG.toml}
# Stop requeueing after this many runs (a build that never finishes is a config problem).
MAX_RUNS=${GCMC_MAX_RUNS:-10}

# One thread per rank for every library that could start its own.
export OMP_NUM_THREADS=1 OPENBLAS_NUM_THREADS=1 MKL_NUM_THREADS=1 NUMBA_NUM_THREADS=1

# The environment with gcmc installed (pip install -e '.[mpi]' and an MPI for mpi4py).
# module load python mpi    # site-specific
# source /path/to/venv/bin/activate

run=${SLURM_RESTART_COUNT:-0}
echo "$(date -Is) job ${SLURM_JOB_ID} run $((run + 1)) on ${SLURM_JOB_NUM_NODES} node(s), \
${SLURM_NTASKS} rank(s): gcmc build ${CONFIG}"

# Validate the config before asking for ranks (exit 2 with one line naming the field).
gcmc build "${CONFIG}" --plan-only || exit $?

step_pid=""
requeue() {
    # The time limit is near (or the job is being preempted). Stop the build (finished tasks
    # are on disk; the running ones are lost and redone), then put the job back in the queue:
    # its next run starts this script again with the same command, which resumes.
    echo "$(date -Is) signal received: stopping the build and requeueing job ${SLURM_JOB_ID}"
    if [[ -n "${step_pid}" ]]; then
        kill -TERM "${step_pid}" 2>/dev/null   # srun forwards it to every rank
        wait "${step_pid}"
    fi
    if (( run + 1 >= MAX_RUNS )); then
        echo "$(date -Is) ${MAX_RUNS} runs used; not requeueing. Resubmit to continue."
        exit 1
    fi
    scontrol requeue "${SLURM_JOB_ID}"
    exit 0
}
trap requeue USR1   # not TERM: scancel must end the job, not requeue it

# srun starts one rank per task slot; --mpi=pmi2 suits MPICH (also the pip wheel "mpich"),
# use --mpi=pmix for Open MPI builds that want it (`srun --mpi=list` shows what the site has).
# Alternatively: mpiexec -n "${SLURM_NTASKS}" gcmc build "${CONFIG}" --no-progress
#
# The build lock (<output>/<name>.lock) is held by rank 0 and names this job and its run;
# a requeued run of the same job takes over the lock its previous run left behind, even on
# another node. A different job on the same output is refused (exit 2).
#
# Run in the background and wait, so that bash can run the trap while the build runs.
srun --mpi=pmi2 --kill-on-bad-exit=1 gcmc build "${CONFIG}" --no-progress &
step_pid=$!
wait "${step_pid}"
rc=$?
step_pid=""

case ${rc} in
    0) echo "$(date -Is) build complete" ;;
    1) echo "$(date -Is) build incomplete: some task(s) failed (see the messages above and" \
            "<output>/<name>.log). Fix the cause and resubmit; finished tasks are kept." ;;
    2) echo "$(date -Is) refused: bad input or the output is locked by another build" ;;
    *) echo "$(date -Is) build stopped with exit code ${rc}; resubmit the same script to resume" ;;
esac
exit "${rc}"
