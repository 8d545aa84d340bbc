"""Speed and memory of the engine against one bare read pass, side by side in one run.

Writes a synthetic Zarr stack of the requested size (zarr's default compressor,
chunks (T, 128, 128)), then runs each step in its own fresh process, which
reports its wall time and peak resident memory:

  read      one bare pass that reads and decompresses every chunk (the limit)
  maps      tempofield.analyze with maps_only=True (spectral maps)
  full      tempofield.analyze (maps + Gram + references + per-pixel phase)
  naive     read in bands + numpy.fft.rfft along time + argmax (a typical script)
  maps/4    the spectral maps of a quarter of the field (memory must not grow with the stack)
  maps/2    the spectral maps of the top half of the field (same width, half the height)
  topology  everything after the Gram pass for T = 1000 frames (target <= 3 s)

and prints a table of times, ratios to the read pass, and peak memory. Shared
machines are noisy, so the steps run in rounds (read, maps, full, ... then again,
``--repeat`` times) and each step's best time is used: the ratios compare runs
made minutes apart on the same machine state, never a quiet run with a busy one.
Targets (DESIGN.md): maps <= 2x read, full <= 3x read, both faster than naive,
peak memory under 2 GB and not growing with the stack.

Usage: python benchmarks/bench_engine.py [--size-gb 1.26] [--frames 600] [--repeat 3] [--workdir DIR]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np


def make_store(path: Path, frames: int, side: int, dt: float) -> None:
    import zarr

    rng = np.random.default_rng(0)
    root = zarr.open_group(str(path), mode="w", zarr_format=3)
    root.attrs["ome"] = {"version": "0.5", "multiscales": [{
        "name": "bench", "axes": [{"name": "t", "type": "time", "unit": "second"},
                                  {"name": "y", "type": "space", "unit": "micrometer"},
                                  {"name": "x", "type": "space", "unit": "micrometer"}],
        "datasets": [{"path": "0", "coordinateTransformations": [{"type": "scale", "scale": [dt, 1.0, 1.0]}]}]}]}
    arr = root.create_array("0", shape=(frames, side, side), chunks=(frames, 128, 128), dtype="uint16",
                            dimension_names=["t", "y", "x"])
    t = np.arange(frames, dtype=np.float32)[:, None, None] * dt
    yy, xx = np.mgrid[0:128, 0:128].astype(np.float32)
    for y0 in range(0, side, 128):
        band = np.empty((frames, 128, side), np.uint16)
        for x0 in range(0, side, 128):
            delay = np.hypot(yy + y0 - side / 3, xx + x0 - side / 3) * 2e-4
            tissue = np.hypot(yy + y0 - side / 2, xx + x0 - side / 2) < 0.4 * side
            beat = 60 * np.sin(2 * np.pi * 1.2 * (t - delay)) * tissue
            noise = rng.normal(0, 40, beat.shape).astype(np.float32)
            band[:, :, x0:x0 + 128] = np.clip(1000 + beat + noise, 0, 65535).astype(np.uint16)
        arr[:, y0:y0 + 128, :] = band


def step(name: str, store: str) -> dict:
    import dask
    import dask.array as da
    import zarr

    if name in ("maps", "full", "maps/4", "maps/2", "topology"):
        # Imports (and loading the compiled loops, which is part of importing
        # them) are not timed, as the read step's imports are not.
        import ripser  # noqa: F401 - persistence (imported by the engine when the references start)
        import skimage.restoration  # noqa: F401 - unwrapping in the propagation step

        import tempofield
        import tempofield.engine.run  # the package loads lazily: import the engine before the clock starts
        import tempofield.engine.stack
        import tempofield.kernels.rhythm
        from tempofield import kernels

        kernels.warm_up()
    t0 = time.perf_counter()
    if name == "read":
        x = da.from_zarr(zarr.open_group(store, mode="r")["0"])
        x.map_blocks(lambda b: np.zeros((1, 1, 1), b.dtype), chunks=(1, 1, 1)).compute(scheduler="threads")
    elif name in ("maps", "full", "maps/4", "maps/2"):
        st = tempofield.open_stack(store)
        if name in ("maps/4", "maps/2"):  # a quarter of the field; the top half (same width)
            h = st.shape[1] // 2
            w = h if name == "maps/4" else st.shape[2]
            st = tempofield.open_stack(st.data[:, :h, :w], frame_interval_s=st.frame_interval_s)
        res = tempofield.analyze(st, (30, 180), maps_only=(name != "full"))
        stages = {k: round(v, 2) for k, v in res.timings.items()}
    elif name == "topology":
        # Everything after the Gram pass for T = 1000 frames: G = X X^T of the capped
        # bin traces (20 000, the default cap), sliding-window distances, persistence
        # on 200 landmarks (the default), circular coordinates, beats.
        from tempofield.kernels.rhythm import region_reference

        rng = np.random.default_rng(1)
        t = np.arange(1000)[:, None] * 0.02
        x = (np.sin(2 * np.pi * 1.2 * (t - rng.uniform(0, 0.3, 20000)[None]))
             + rng.normal(0, 1.0, (1000, 20000))).astype(np.float32)
        t0 = time.perf_counter()
        ref = region_reference(x, 0.02, 72.0)
        assert abs(ref.rate_mean_bpm - 72.0) < 1.0
    elif name == "naive":
        z = zarr.open_group(store, mode="r")["0"]
        dt = 0.02
        freqs = np.fft.rfftfreq(z.shape[0], dt)
        band = (freqs >= 0.5) & (freqs <= 3.0)
        rate = np.empty(z.shape[1:], np.float64)
        for y0 in range(0, z.shape[1], 128):
            x = z[:, y0:y0 + 128, :].astype(np.float64)
            x -= x.mean(axis=0)
            power = np.abs(np.fft.rfft(x, axis=0)) ** 2
            rate[y0:y0 + 128] = freqs[band][np.argmax(power[band], axis=0)] * 60
    else:
        raise SystemExit(f"unknown step {name}")
    seconds = time.perf_counter() - t0
    dask.config.refresh()
    out = {"step": name, "seconds": seconds, "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}
    if name == "full":
        out["stages"] = stages
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--size-gb", type=float, default=1.26)
    ap.add_argument("--frames", type=int, default=600)
    ap.add_argument("--workdir", default=None)
    ap.add_argument("--steps", default="read,maps,full,naive,maps/4,maps/2,topology")
    ap.add_argument("--repeat", type=int, default=3, help="rounds of all steps; each step's best time is kept")
    ap.add_argument("--step", help=argparse.SUPPRESS)
    ap.add_argument("--store", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.step:
        print(json.dumps(step(args.step, args.store)))
        return 0
    side = int(np.sqrt(args.size_gb * 1e9 / 2 / args.frames) // 128 * 128)
    work = Path(args.workdir or tempfile.mkdtemp(prefix="tempofield-bench-"))
    store = work / f"bench_{args.frames}x{side}x{side}.ome.zarr"
    if not store.exists():
        print(f"writing {store} ({args.frames} x {side} x {side} uint16, "
              f"{args.frames * side * side * 2 / 1e9:.2f} GB) ...", flush=True)
        make_store(store, args.frames, side, 0.02)
    names = ["read"] + [s for s in args.steps.split(",") if s != "read"]
    best: dict[str, dict] = {}
    per_round: dict[str, list[float]] = {}  # each step's time over the same round's read
    for round_ in range(args.repeat):
        print(f"round {round_ + 1} of {args.repeat}", flush=True)
        for name in names:
            out = subprocess.run([sys.executable, __file__, "--step", name, "--store", str(store)],
                                 capture_output=True, text=True,
                                 env={**os.environ, "PYTHONWARNINGS": "ignore"})
            if out.returncode:
                print(out.stderr, file=sys.stderr)
                return 1
            row = json.loads(out.stdout.strip().splitlines()[-1])
            print(f"  {name:8s} {row['seconds']:7.2f} s  peak {row['peak_mb']:7.0f} MB"
                  + (f"  stages {row['stages']}" if "stages" in row else ""), flush=True)
            if name == "read":
                read_now = row["seconds"]
            per_round.setdefault(name, []).append(row["seconds"] / read_now)
            seen = best.setdefault(name, row)
            # the best time, and the highest peak memory of any round
            best[name] = {"step": name, "seconds": min(seen["seconds"], row["seconds"]),
                          "peak_mb": max(seen["peak_mb"], row["peak_mb"])}
    rows = [best[name] for name in names]
    print("\nbest time of each step, highest peak memory:")
    read = rows[0]["seconds"]
    print(f"\n{'step':8s} {'seconds':>8s} {'x read':>7s} {'median x read':>14s} {'peak MB':>8s}")
    for r in rows:
        med = float(np.median(per_round[r["step"]]))
        print(f"{r['step']:8s} {r['seconds']:8.2f} {r['seconds'] / read:7.2f} {med:14.2f} {r['peak_mb']:8.0f}")
    print("(x read: best time over best read; median x read: the median over rounds of the time over that "
          "round's read)")
    by = {r["step"]: r for r in rows}
    if "maps" in by and "naive" in by:
        print(f"\nmaps vs naive: {by['naive']['seconds'] / by['maps']['seconds']:.2f}x faster")
    if "full" in by and "naive" in by:
        print(f"full vs naive: {by['naive']['seconds'] / by['full']['seconds']:.2f}x faster")
    if "maps" in by and "maps/4" in by:
        print(f"peak memory, whole field / quarter field: {by['maps']['peak_mb'] / by['maps/4']['peak_mb']:.2f}")
    if "maps" in by and "maps/2" in by:
        print(f"peak memory, whole field / top half (same width): {by['maps']['peak_mb'] / by['maps/2']['peak_mb']:.2f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
