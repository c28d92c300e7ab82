"""Run a description on a batch cluster (SLURM, PBS, SGE, LSF) through Dask workers started by dask-jobqueue.

Each batch job hosts ``--workers-per-job`` single-threaded Dask workers; the driver (this script) runs on a login
or head node, submits one task per missing realization and records nothing itself: the run directory, which must
be on a file system shared by all nodes (same path everywhere), is the record of what is done. Workers that are
killed (wall time, pre-emption) are replaced by new jobs; their realizations are rescheduled and continue from
their last checkpoint. Rerun the same command to pick up anything left.

Example::

    pip install 'mpo-fronts[dask]' dask-jobqueue
    python scripts/prod_dask_jobqueue.py data/production_example.toml --out /shared/runs/w6 \\
        --system slurm --jobs 8 --workers-per-job 4 --queue normal --walltime 04:00:00 --memory 8GB

Without this script, a plain job array does the same with no scheduler at all (claims keep shards apart)::

    #SBATCH --array=0-15
    fronts run run.toml --out /shared/runs/w6 --shard ${SLURM_ARRAY_TASK_ID}/16 --progress log
"""

from __future__ import annotations

import argparse
import sys

SYSTEMS = {"slurm": "SLURMCluster", "pbs": "PBSCluster", "sge": "SGECluster", "lsf": "LSFCluster"}


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("description", metavar="RUN.toml", help="the run description")
    p.add_argument("--out", required=True, help="run directory on a shared file system (required)")
    p.add_argument("--system", choices=sorted(SYSTEMS), default="slurm", help="batch system (default: slurm)")
    p.add_argument("--jobs", type=int, default=4, help="batch jobs to keep running (default: 4)")
    p.add_argument("--workers-per-job", type=int, default=1,
                   help="single-threaded Dask workers per job, one core each (default: 1)")
    p.add_argument("--memory", default="4GB", help="memory per job (default: 4GB)")
    p.add_argument("--walltime", default="04:00:00", help="wall time per job (default: 04:00:00)")
    p.add_argument("--queue", default=None, help="queue / partition (default: the system's default)")
    p.add_argument("--account", default=None, help="account / project to charge (default: none)")
    p.add_argument("--progress", choices=("auto", "bar", "log", "none"), default="log",
                   help="progress display of the driver (default: log)")
    args = p.parse_args(argv)

    from mpo_fronts.config import read_description
    from mpo_fronts.ensemble import run_ensemble
    from mpo_fronts.errors import MissingDependencyError, UserError

    try:
        desc = read_description(args.description)
        try:
            import dask_jobqueue as jobqueue
        except ImportError:
            raise MissingDependencyError("dask-jobqueue is not installed; install it with "
                                         "\"pip install 'mpo-fronts[dask]' dask-jobqueue\"") from None
        cls = getattr(jobqueue, SYSTEMS[args.system])
        n = args.workers_per_job
        cluster = cls(cores=n, processes=n, memory=args.memory, walltime=args.walltime, queue=args.queue,
                      account=args.account,
                      job_script_prologue=["export OMP_NUM_THREADS=1 OPENBLAS_NUM_THREADS=1 MKL_NUM_THREADS=1"])
        try:
            cluster.scale(jobs=args.jobs)
            rep = run_ensemble(desc, args.out, dask=cluster.scheduler_address, progress=args.progress)
        finally:
            cluster.close()
    except UserError as exc:
        print(f"prod_dask_jobqueue: error: {exc}", file=sys.stderr)
        return 2
    print(f"{args.out}: computed {len(rep.computed)}, already done {len(rep.existing)}, "
          f"held by other runs {len(rep.busy)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
