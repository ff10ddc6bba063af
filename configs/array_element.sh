#!/bin/sh
# One element of a job array: computes the INDEX-th point still to compute of a
# job into a point-lines file of its own (docs/guide.md, Pipelines and job
# arrays). Before the array: `fieldprop point JOB --zero-field`, then
# `n=$(fieldprop plan JOB --count)` and submit elements 0 .. n-1 with this
# script; after it: `fieldprop collect JOB --points POINTS_DIR`.
#
#   sh configs/array_element.sh JOB.toml POINTS_DIR [ROUND]
#
# INDEX comes from the scheduler's array variable (0-based): SLURM_ARRAY_TASK_ID,
# PBS_ARRAY_INDEX, or SGE_TASK_ID and LSB_JOBINDEX (1-based, so minus one), or
# FIELDPROP_INDEX when set. ROUND numbers the submission (default 1): a second
# round for lost points writes other files. One BLAS thread unless
# OMP_NUM_THREADS says otherwise.
set -eu
job=$1
points=$2
round=${3:-1}
if [ -n "${FIELDPROP_INDEX:-}" ]; then index=$FIELDPROP_INDEX
elif [ -n "${SLURM_ARRAY_TASK_ID:-}" ]; then index=$SLURM_ARRAY_TASK_ID
elif [ -n "${PBS_ARRAY_INDEX:-}" ]; then index=$PBS_ARRAY_INDEX
elif [ -n "${SGE_TASK_ID:-}" ] && [ "${SGE_TASK_ID}" != "undefined" ]; then index=$((SGE_TASK_ID - 1))
elif [ -n "${LSB_JOBINDEX:-}" ]; then index=$((LSB_JOBINDEX - 1))
else
    echo "array_element.sh: no array index (SLURM_ARRAY_TASK_ID, PBS_ARRAY_INDEX, SGE_TASK_ID, LSB_JOBINDEX or FIELDPROP_INDEX)" >&2
    exit 2
fi
mkdir -p "$points"
# Written under a temporary name and moved into place whole: collect never
# reads half a file.
part="$points/$round-$index.part"
fieldprop point "$job" --index "$index" --stdout --threads "${OMP_NUM_THREADS:-1}" --quiet > "$part"
mv "$part" "$points/$round-$index.jsonl"
