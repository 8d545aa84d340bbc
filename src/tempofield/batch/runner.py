"""Batch runner: analyse a whole experiment on a dask.distributed cluster.

One command takes a glob, a list of paths or a CSV manifest, one TOML config
(analysis options from :data:`tempofield.engine.options.OPTIONS`, a rate band, a
``[cluster]`` table) and an output folder, and writes one result folder per
stack plus ``summary.csv``, ``summary.png`` and ``failures.csv``. The cluster is
dask's own: a :class:`distributed.LocalCluster` of worker processes by default,
an existing scheduler (``--scheduler`` or ``DASK_SCHEDULER_ADDRESS``), or SLURM
/ PBS jobs through dask-jobqueue. Scheduling, retries and re-assignment after a
lost worker are dask's; this module only decides what needs doing.

Each stack is opened here (metadata only), TIFF and video inputs are converted
to OME-Zarr on a worker (a TIFF-backed dask array cannot travel between
processes), and :func:`tempofield.analyze` then runs its tile graph on the
workers through the default client, so one stack's chunks are computed in
parallel and several stacks are in flight at once. A result folder is written
beside its place and renamed (``RhythmResult.save``), so it is complete or
absent; a rerun skips a stack whose folder is complete and whose ``run.json``
holds the same parameters and input identity, and redoes stale or partial ones.

Only :mod:`tempofield`'s public API, :mod:`tempofield.engine.options`,
:func:`tempofield.engine.convert.convert_stack`, :func:`tempofield.outputs.result.is_complete`
and the shared command-line arguments of :mod:`tempofield.cliargs` are used. The
logic lives in the modules beside this one: ``config`` (what a batch is),
``resume``, ``cluster``, ``tasks`` (running it) and ``summary``; this one is
the command line.
"""

from __future__ import annotations

import argparse
import signal
import sys
import threading
import time

from tempofield.batch.cluster import connect, make_jobqueue_cluster
from tempofield.batch.config import (
    CLUSTER_KINDS,
    FAILURES_CSV,
    SUMMARY_CSV,
    BatchPlan,
    UsageError,
    build_plan,
    cluster_settings,
    load_config,
)
from tempofield.batch.resume import folder_state
from tempofield.batch.summary import write_outputs
from tempofield.batch.tasks import _open, clean_leftovers, output_lock, run_batch
from tempofield.errors import TempofieldError


def build_parser() -> argparse.ArgumentParser:
    from tempofield.cliargs import add_analysis_arguments

    p = argparse.ArgumentParser(
        prog="tempofield batch",
        description="Analyse many stacks on a dask cluster (local worker processes, a running scheduler, or "
                    "SLURM/PBS jobs) and write one result folder per stack plus summary.csv and summary.png. "
                    "Reruns skip finished stacks. Exit code 0: all stacks analysed; 1: some failed "
                    "(see failures.csv); 2: bad command line or config; 130: interrupted.")
    p.add_argument("inputs", nargs="*", help="stacks: paths, quoted globs ('data/**/*.tif') or CSV manifests")
    p.add_argument("-o", "--out", help="batch output folder (or [batch] out in the config)")
    p.add_argument("-c", "--config", help="TOML config with [batch], [analysis] and [cluster] tables")
    p.add_argument("--manifest", help="CSV with a 'path' column, optional name/frame_interval_s/pixel_size_um/"
                                      "channel/plane, and free columns (well, condition, dose...) for the summary")
    c = p.add_argument_group("cluster")
    c.add_argument("--scheduler", metavar="ADDRESS",
                   help="use a running dask scheduler, e.g. tcp://10.0.0.5:8786 (default: DASK_SCHEDULER_ADDRESS, "
                        "else the [cluster] table)")
    c.add_argument("--cluster", choices=CLUSTER_KINDS, help="kind of cluster to start (overrides [cluster] kind)")
    c.add_argument("--workers", type=int, metavar="N", help="local worker processes")
    c.add_argument("--threads-per-worker", type=int, metavar="N", help="threads per local worker process")
    c.add_argument("--jobs", type=int, metavar="N", help="SLURM/PBS jobs to submit")
    c.add_argument("--in-flight", type=int, metavar="N",
                   help="stacks handed to dask at once (default: worker threads + 1)")
    c.add_argument("--job-script", action="store_true",
                   help="print the SLURM/PBS job script of the [cluster] table and exit without submitting")
    r = p.add_argument_group("run")
    r.add_argument("--dry-run", action="store_true",
                   help="list each stack and whether it would be analysed, reused or replaced; start nothing")
    r.add_argument("--no-report", action="store_true", help="do not draw report.png in each result folder")
    r.add_argument("--quiet", action="store_true", help="no progress bars")
    add_analysis_arguments(p)
    return p


def dry_run(plan: BatchPlan, stream=None) -> None:
    """Print, per stack, what a run would do with it; starts no cluster."""
    stream = stream or sys.stdout
    actions = {"absent": "analyse", "finished": "reuse", "stale": "re-analyse (stale)",
               "partial": "re-analyse (partial folder)", "foreign": "refuse (folder not made by the runner)"}
    for item in plan.items:
        try:
            state = folder_state(plan.out / item.name, plan.parameters, _open(item).identity())
            action = actions[state]
        except Exception as exc:  # noqa: BLE001
            action = f"fail ({type(exc).__name__}: {exc})"
        print(f"{item.name}\t{action}\t{item.source}", file=stream)


def main(argv=None) -> int:
    """Run a batch from the command line and return the exit code (0, 1, 2 or 130)."""
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # argparse has printed its message
        return int(exc.code or 0)
    try:
        cfg = load_config(args.config) if args.config else {}
        if args.job_script:
            settings = cluster_settings(cfg, args)
            if settings["kind"] == "local":
                raise UsageError("--job-script needs [cluster] kind = \"slurm\" or \"pbs\" (or --cluster slurm).")
            cluster = make_jobqueue_cluster(settings)
            try:
                print(cluster.job_script())
            finally:
                cluster.close()
            return 0
        plan = build_plan(args, cfg)
        if args.dry_run:
            dry_run(plan)
            return 0
        return execute(plan, quiet=args.quiet)
    except TempofieldError as exc:
        print(f"tempofield batch: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("tempofield batch: interrupted. Finished stacks are kept; run the same command again to "
              "finish the rest.", file=sys.stderr)
        return 130


def execute(plan: BatchPlan, *, quiet: bool = False) -> int:
    """Run a validated plan: lock the output folder, connect, analyse, summarise; return the exit code."""
    previous = None
    if threading.current_thread() is threading.main_thread():
        # A job killed at its wall time gets SIGTERM first: stop like Ctrl-C, keeping finished stacks.
        previous = signal.signal(signal.SIGTERM, _raise_interrupt)
    try:
        with output_lock(plan.out):
            clean_leftovers(plan.out)
            conn = connect(plan.cluster)
            outcomes = None
            try:
                print(f"tempofield batch: {len(plan.items)} stack(s) -> {plan.out} on {conn.description}",
                      file=sys.stderr)
                if conn.dashboard:
                    print(f"tempofield batch: dask dashboard at {conn.dashboard}", file=sys.stderr)
                t0 = time.perf_counter()
                outcomes = run_batch(plan, conn, show_progress=not quiet)
            finally:
                conn.close()
            clean_leftovers(plan.out)  # of attempts on workers that died
            write_outputs(plan, outcomes)
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)
    counts = {s: sum(o.status == s for o in outcomes) for s in ("done", "reused", "failed")}
    print(f"tempofield batch: {counts['done']} analysed, {counts['reused']} already finished, {counts['failed']} "
          f"failed in {time.perf_counter() - t0:.1f} s; summary in {plan.out / SUMMARY_CSV}"
          + (f", failures in {plan.out / FAILURES_CSV}" if counts["failed"] else ""))
    return 1 if counts["failed"] else 0


def _raise_interrupt(signum, frame):
    raise KeyboardInterrupt


if __name__ == "__main__":
    raise SystemExit(main())
