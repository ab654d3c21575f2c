#!/bin/bash
# PBS batch template: one gapline run. Fill the {placeholders} and submit with `qsub`.
#PBS -N {job_name}
#PBS -l select=1:ncpus={cpus}:mem={memory}
#PBS -l walltime={time_limit}
#PBS -j oe
#PBS -o {log_dir}
set -euo pipefail
export GAPLINE_PROGRESS=plain
export OMP_NUM_THREADS={cpus}
cd {project_dir}
.venv/bin/gapline run {config} --store {store}
