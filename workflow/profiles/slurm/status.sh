#!/bin/sh
# Snakemake status command for SLURM without accounting: prints running, success or failed
# for the job ID given (the cluster-generic executor calls it for each job it waits for).
# The state is read with scontrol, which knows a job until MinJobAge seconds (slurm.conf,
# 300 by default) after it ended; with accounting, sacct is asked when scontrol no longer
# knows the job.  A controller that cannot be reached reads as running (asked again later).
id="$1"
out=$(scontrol show job -o "$id" 2>&1)
rc=$?
if [ $rc -ne 0 ]; then
    case "$out" in
        *"Invalid job id"*) state=$(sacct -n -X -P -j "$id" -o State 2>/dev/null | head -n 1) ;;
        *) echo running; exit 0 ;;
    esac
else
    state=$(printf '%s\n' "$out" | sed -n 's/.*JobState=\([A-Z_]*\).*/\1/p' | head -n 1)
fi
case "$state" in
    COMPLETED*) echo success ;;
    PENDING* | RUNNING* | CONFIGURING* | COMPLETING* | SUSPENDED* | REQUEUED* | RESIZING* \
        | STAGE_OUT* | SIGNALING* | REQUEUE_FED* | REQUEUE_HOLD* | RESV_DEL_HOLD*)
        echo running ;;
    *) echo failed ;;  # CANCELLED, FAILED, TIMEOUT, OUT_OF_MEMORY, NODE_FAIL, ... or unknown
esac
