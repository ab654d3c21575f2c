#!/bin/bash
# gapline batch job: @{kind}. Rendered by 'gapline submit' from workflows/batch-job.sh
# (slots: an at sign before a braced name; the header comes from pipeline/submit.py).
@{header}
set -euo pipefail
export GAPLINE_PROGRESS=plain
export OMP_NUM_THREADS=@{threads}
export PYTHONPATH="@{project_dir}${PYTHONPATH:+:$PYTHONPATH}"
cd "@{work_dir}"
@{command}
