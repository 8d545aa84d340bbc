"""Batch-runner throughput: 1 vs 2 workers, and the runner's own cost per stack against calling analyze.

Writes N synthetic OME-Zarr stacks (whole-time chunks, default compressor, so
the work is compute- rather than I/O-bound), then measures side by side in one
run, each on a fresh LocalCluster of worker processes (1 thread each), with
the whole process tree pinned to as many cores as there are workers
(``os.sched_setaffinity``, inherited by the worker processes), since the
runner's per-stack driver tasks secede from the workers' thread pools and
would otherwise use the second core even with one worker:

* direct   - a plain loop ``analyze(stack) ; result.save(folder)`` on 1 worker, 1 core
             (the default client, so tiles run on the worker as in the runner)
* runner/1 - ``tempofield batch`` on 1 worker, 1 core, one stack at a time
* runner   - ``tempofield batch`` on 1 worker, 1 core, stacks pipelined (its default)
* runner   - ``tempofield batch`` on 2 workers, 2 cores (its default)

and prints times, stacks per second, the speed-up 2 vs 1 worker, and the
overhead per stack of runner/1 against direct. Per-stack reports are off in
every variant (report.png is the same matplotlib cost with or without the
runner). Not a test: ``python benchmarks/bench_runner.py --n-stacks 8``.
"""

from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

ALL_CORES = set(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else set()


def make_stacks(folder: Path, n: int, shape) -> list[Path]:
    import tempofield
    from tempofield.engine.convert import convert_stack
    from tempofield.scenes import synthetic

    paths = []
    t, y, x = shape
    for i in range(n):
        path = folder / f"bench_{i:02d}.ome.zarr"
        if not path.exists():
            s = synthetic.well_scene(shape, frame_interval_s=0.04, rate_bpm=60 + 4 * i,
                                     pacemaker=(0.3 * y, 0.3 * x), cluster_center=(0.7 * y, 0.7 * x),
                                     cluster_radius_px=0.1 * min(y, x), rng=i)
            convert_stack(tempofield.open_stack(s.frames, frame_interval_s=0.04, pixel_size_um=4.0), path)
        paths.append(path)
    return paths


def cluster(n_workers):
    from distributed import Client, LocalCluster

    if hasattr(os, "sched_setaffinity"):
        cores = sorted(os.sched_getaffinity(0) | ALL_CORES)[:n_workers]
        os.sched_setaffinity(0, cores)  # inherited by the worker processes started below

    lc = LocalCluster(n_workers=n_workers, threads_per_worker=1, processes=True, dashboard_address=":0")
    return lc, Client(lc)


def time_direct(paths, out: Path, rate) -> float:
    import tempofield

    t0 = time.perf_counter()
    for p in paths:
        res = tempofield.analyze(tempofield.open_stack(p), rate)
        res.save(out / p.name.replace(".ome.zarr", ""))
    return time.perf_counter() - t0


def time_runner(paths, out: Path, rate, address, *extra) -> float:
    from tempofield.batch import runner

    argv = [*map(str, paths), "-o", str(out), "--scheduler", address, "--rate-range", *map(str, rate),
            "--no-report", "--quiet", *extra]
    t0 = time.perf_counter()
    rc = runner.main(argv)
    elapsed = time.perf_counter() - t0
    if rc != 0:
        raise SystemExit(f"the batch failed (exit code {rc}); see {out / 'failures.csv'}")
    return elapsed


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--n-stacks", type=int, default=8)
    p.add_argument("--shape", type=int, nargs=3, default=(600, 128, 128), metavar=("T", "Y", "X"))
    p.add_argument("--workdir", help="where to keep the stacks (default: a temporary folder)")
    args = p.parse_args(argv)
    rate = (30, 150)
    work = Path(args.workdir or tempfile.mkdtemp(prefix="tempofield-bench-runner-"))
    work.mkdir(parents=True, exist_ok=True)
    paths = make_stacks(work / "stacks", args.n_stacks, tuple(args.shape))
    mb = sum(f.stat().st_size for p_ in paths for f in p_.rglob("*") if f.is_file()) / 2**20
    print(f"{len(paths)} stacks of {tuple(args.shape)} uint16 ({mb:.0f} MB on disk); cpu count {os.cpu_count()}")

    times = {}
    lc, client = cluster(1)
    try:
        # warm-up: imports and first-call costs on the worker and here
        time_direct(paths[:1], Path(tempfile.mkdtemp(dir=work)), rate)
        times["direct, 1 worker, 1 core"] = time_direct(paths, Path(tempfile.mkdtemp(dir=work)), rate)
        times["runner, 1 worker, 1 core, 1 in flight"] = time_runner(
            paths, Path(tempfile.mkdtemp(dir=work)) / "o", rate, lc.scheduler_address, "--in-flight", "1")
        times["runner, 1 worker, 1 core"] = time_runner(paths, Path(tempfile.mkdtemp(dir=work)) / "o", rate,
                                                lc.scheduler_address)
    finally:
        client.close()
        lc.close()
    lc, client = cluster(2)
    try:
        time_direct(paths[:1], Path(tempfile.mkdtemp(dir=work)), rate)
        times["runner, 2 workers, 2 cores"] = time_runner(paths, Path(tempfile.mkdtemp(dir=work)) / "o", rate,
                                                 lc.scheduler_address)
    finally:
        client.close()
        lc.close()

    n = len(paths)
    print(f"load average during the run: {os.getloadavg()[0]:.1f} (other work on the machine skews these figures)")
    print(f"\n{'variant':<42}{'time (s)':>10}{'stacks/s':>10}")
    for k, v in times.items():
        print(f"{k:<42}{v:>10.2f}{n / v:>10.2f}")
    direct = times["direct, 1 worker, 1 core"]
    serial = times["runner, 1 worker, 1 core, 1 in flight"]
    print(f"\nspeed-up 2 vs 1 worker (runner)        {times['runner, 1 worker, 1 core'] / times['runner, 2 workers, 2 cores']:.2f}x")
    print(f"speed-up 2 workers vs direct loop      {direct / times['runner, 2 workers, 2 cores']:.2f}x")
    print(f"runner overhead per stack (1 in flight) {(serial - direct) / n * 1000:+.0f} ms "
          f"({100 * (serial / direct - 1):+.1f}% of direct analyze+save)")
    print(f"runner, 1 worker, pipelined vs direct   {100 * (times['runner, 1 worker, 1 core'] / direct - 1):+.1f}%")
    if not args.workdir:
        shutil.rmtree(work, ignore_errors=True)
    return 0


if __name__ == "__main__":  # worker processes are spawned: keep module import side-effect free
    sys.exit(main())
