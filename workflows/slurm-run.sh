#!/bin/bash
# SLURM batch template: one gapline run. Fill the {placeholders} (or edit by hand) and
# submit with `sbatch`. The scipy backend uses one task; threads come from BLAS.
#SBATCH --job-name={job_name}
#SBATCH --ntasks=1
#SBATCH --cpus-per-task={cpus}
#SBATCH --mem={memory}
#SBATCH --time={time_limit}
#SBATCH --output={log_dir}/%x-%j.out
set -euo pipefail
export GAPLINE_PROGRESS=plain
export OMP_NUM_THREADS="${SLURM_CPUS_PER_TASK:-1}"
cd {project_dir}
.venv/bin/gapline run {config} --store {store}
