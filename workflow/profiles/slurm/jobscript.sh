#!/bin/sh
# properties = {properties}
# The job's first log line: where it ran and what SLURM gave it.
echo "seqstate-slurm-job: id $SLURM_JOB_ID node $SLURMD_NODENAME cpus $SLURM_CPUS_PER_TASK mem_mb $SLURM_MEM_PER_NODE" >&2
{exec_job}
