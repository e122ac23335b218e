#!/bin/bash
# One infer chain on a Slurm cluster under MPI, in as many jobs as it takes.
#
#   sbatch configs/slurm_job.sh RUNFILE.toml [CHAIN.h5]
#
# CHAIN defaults to chains/<RUNFILE name without .toml>.h5, relative to the folder you submit from.
# Each job runs `infer run` if CHAIN does not exist yet, else `infer resume CHAIN`, with a wall-time budget
# (--time-limit) INFER_MARGIN seconds (default 300) below what is left of the job. So infer stops by itself
# before Slurm does, writes its checkpoint and exits 75 (paused); the job then submits itself again, to
# start after this one ends (--dependency=afterany), and the next job resumes the chain exactly where it
# stopped. This repeats until infer exits 0: the stopping rule was met or [sampling] steps were reached.
# A SIGTERM from Slurm (scancel, pre-emption) is handled the same way: infer checkpoints and exits 75.
#
# infer's exit codes, which this script passes on as its own:
#   0  finished              no resubmission; with --summarize the summary is written beside the chain
#   75 paused (resumable)    resubmitted, unless the job made no progress or INFER_MAX_JOBS jobs ran
#   2  bad input             fix the run file or the command line (the log says which key), resubmit
#   1  internal error        a bug; the chain file still holds the last checkpoint; please report it
#
# Put job options in the #SBATCH lines below rather than on the sbatch command line: a resubmitted job
# reads only this file. Size the job so that walkers/2 (the points of one posterior call) is a multiple
# of ntasks − 1 (rank 0 drives, the others evaluate): e.g. walkers = 64 → 32 points → ntasks = 33 or 17.
#
# Install once (in the Python environment the job activates): pip install ".[mpi]"   (mpi4py + MPICH)
#
#SBATCH --job-name=infer
#SBATCH --ntasks=33
#SBATCH --cpus-per-task=1
#SBATCH --time=24:00:00
#SBATCH --output=infer-%x-%j.log
#SBATCH --open-mode=append

set -uo pipefail

run_file=${1:?usage: sbatch slurm_job.sh RUNFILE.toml [CHAIN.h5]}
chain=${2:-chains/$(basename "${run_file%.toml}").h5}
margin=${INFER_MARGIN:-300}                 # seconds kept free for start-up, the last checkpoint, exit
max_jobs=${INFER_MAX_JOBS:-50}              # a safety net against an endless chain of jobs
job_count=${INFER_JOB_COUNT:-1}
read -r -a infer_cmd <<< "${INFER:-infer}"             # e.g. INFER="python -m infer"
read -r -a mpiexec_cmd <<< "${MPIEXEC:-mpiexec -n ${SLURM_NTASKS:-2}}"
# On sites that launch MPI through Slurm itself: MPIEXEC="srun --mpi=pmi2" (or pmix).

# CAMB's OpenMP threads per rank come from [sampling] threads_per_worker in the run file (default 1),
# never from the number of ranks, so that the chain does not depend on it; keep --cpus-per-task equal to
# it. 1 thread and one rank per core is the usual choice (benchmarks/bench_parallel.py measures both ways).
# This export only keeps NumPy's BLAS in every rank within the task's cores; infer sets CAMB's own count.
export OMP_NUM_THREADS=${SLURM_CPUS_PER_TASK:-1}

cd "${SLURM_SUBMIT_DIR:-.}" || exit 2

# Seconds left in this job, from squeue's %L ([D-]HH:MM:SS, MM:SS or SS); empty if unknown.
seconds_left() {
    local left d=0 h=0 m=0 s=0
    left=$(squeue -h -j "${SLURM_JOB_ID:-}" -o %L 2>/dev/null) || return 0
    [[ $left =~ ^([0-9]+-)?([0-9]+:){0,2}[0-9]+$ ]] || return 0
    if [[ $left == *-* ]]; then d=${left%%-*}; left=${left#*-}; fi
    IFS=: read -r -a part <<< "$left"
    case ${#part[@]} in
        3) h=${part[0]}; m=${part[1]}; s=${part[2]} ;;
        2) m=${part[0]}; s=${part[1]} ;;
        1) s=${part[0]} ;;
    esac
    echo $(( 10#$d * 86400 + 10#$h * 3600 + 10#$m * 60 + 10#$s ))
}

# Steps stored in the chain (empty if there is no chain yet), from `infer status`.
steps_done() {
    [[ -f $chain ]] || return 0
    "${infer_cmd[@]}" status "$chain" 2>/dev/null | awk '$1 == "steps" {print $2; exit}'
}

budget=()
left=$(seconds_left)
if [[ -n $left ]]; then
    if (( left <= margin )); then
        echo "infer job: only ${left} s left in the job, within the ${margin} s margin; not starting" >&2
        exit 75
    fi
    budget=(--time-limit "$(( left - margin ))")
fi

before=$(steps_done)
if [[ -f $chain ]]; then
    cmd=("${mpiexec_cmd[@]}" "${infer_cmd[@]}" resume "$chain" "${budget[@]}" --summarize)
else
    cmd=("${mpiexec_cmd[@]}" "${infer_cmd[@]}" run "$run_file" --chain "$chain" "${budget[@]}" --summarize)
fi
echo "infer job ${job_count} (${SLURM_JOB_ID:-no Slurm job}) on $(hostname), $(date '+%F %T'): ${cmd[*]}"

# Run in the background so that a SIGTERM to this shell (scancel, pre-emption) does not kill the shell
# before infer has written its checkpoint: Slurm signals infer's processes too, and we wait for them.
trap 'echo "infer job: SIGTERM received; waiting for infer to write its checkpoint" >&2' TERM
"${cmd[@]}" &
pid=$!
while kill -0 "$pid" 2>/dev/null; do
    wait "$pid"                              # returns early when the trapped signal arrives
done
wait "$pid"                                  # infer's exit status (bash keeps it)
code=$?
trap - TERM
after=$(steps_done)
echo "infer job ${job_count}: exit code ${code}; steps ${before:-none} -> ${after:-none}, $(date '+%F %T')"

case $code in
    0)  echo "infer job: finished (stopping rule met or requested steps reached)" ;;
    75) if [[ -z $after || ( -n $before && $after == "$before" ) ]]; then
            echo "infer job: paused without progress; not resubmitting (is the job's time limit long enough" \
                 "for a few steps plus ${margin} s?)" >&2
        elif (( job_count >= max_jobs )); then
            echo "infer job: paused after ${job_count} jobs (INFER_MAX_JOBS); resubmit by hand to continue" >&2
        elif [[ -z ${SLURM_JOB_ID:-} ]]; then
            echo "infer job: paused; not under Slurm, so not resubmitting (run this script again to continue)"
        else
            sbatch --dependency="afterany:${SLURM_JOB_ID}" --export="ALL,INFER_JOB_COUNT=$(( job_count + 1 ))" \
                "$0" "$run_file" "$chain" || echo "infer job: resubmission failed; resubmit by hand" >&2
        fi ;;
    2)  echo "infer job: bad input (see the error line above); not resubmitting" >&2 ;;
    *)  echo "infer job: stopped with exit code ${code}; the chain holds its last checkpoint; not resubmitting" >&2 ;;
esac
exit "$code"
