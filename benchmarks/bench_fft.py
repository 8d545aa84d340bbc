"""Does the compiled FFT earn its place? The maps kernel on one tile, compiled route against scipy's.

The maps pass runs one compiled call per band of rows (pooling, the
mixed-radix rFFT along time, power, noise median and peak search while the
band is in cache). Where T has no compiled plan (odd T, a prime factor of T/2
above 5) the same kernel pools in a compiled loop and hands the FFT to
``scipy.fft.rfft``. This script times both routes on the same tile, in one
process, one thread, interleaved round by round, for several T, and prints
the median time of each and their ratio. Forcing the scipy route for a T
that has a compiled plan is done by hiding the plan (``fft_tables``).

    python benchmarks/bench_fft.py [--frames 600 1000 1200 2000] [--tile 128] [--rounds 7]
"""

from __future__ import annotations

import argparse
import statistics
import time

import numpy as np


def main(argv=None) -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--frames", type=int, nargs="+", default=[600, 1000, 1200, 2000])
    p.add_argument("--tile", type=int, default=128, help="tile edge in pixels (the benchmark stack's chunk)")
    p.add_argument("--rounds", type=int, default=7)
    args = p.parse_args(argv)

    from threadpoolctl import threadpool_limits

    from tempofield import kernels
    from tempofield.engine import options, tile_kernels
    from tempofield.kernels import preprocess, spectral

    kernels.warm_up()
    opts = options.defaults()
    dt, band = 0.02, (30.0, 180.0)
    rng = np.random.default_rng(0)
    print(f"maps kernel on one {args.tile} x {args.tile} uint16 tile (halo 1), one thread, "
          f"median of {args.rounds} interleaved rounds")
    print(f"{'T':>6} {'compiled FFT ms':>16} {'scipy FFT ms':>13} {'scipy / compiled':>17}")
    plain_tables = spectral.fft_tables
    for t in args.frames:
        if plain_tables(t) is None:
            print(f"{t:>6}  no compiled plan for this T (it always uses scipy)")
            continue
        h = args.tile + 2
        beat = 200 * np.sin(2 * np.pi * 1.2 * np.arange(t) * dt)[:, None, None]
        block = np.clip(1000 + beat + rng.normal(0, 40, (t, h, h)), 0, 65535).astype(np.uint16)
        plan = spectral.plan_spectrum(t, dt, band, false_alarm=opts["false_alarm"])
        basis = preprocess.trend_basis(t, dt, opts["trend_cutoff_fraction"] * band[0] / 60.0)
        times = {"compiled": [], "scipy": []}
        outs = {}
        with threadpool_limits(limits=1):
            for route in ("compiled", "scipy", "compiled", "scipy"):  # warm both
                _run(tile_kernels, spectral, plain_tables, route, block, plan, basis)
            for _ in range(args.rounds):
                for route in ("compiled", "scipy"):
                    t0 = time.perf_counter()
                    outs[route] = _run(tile_kernels, spectral, plain_tables, route, block, plan, basis)
                    times[route].append(time.perf_counter() - t0)
        a, b = statistics.median(times["compiled"]), statistics.median(times["scipy"])
        same = np.allclose(outs["compiled"]["maps"][0], outs["scipy"]["maps"][0], rtol=1e-4, equal_nan=True)
        print(f"{t:>6} {a * 1e3:16.1f} {b * 1e3:13.1f} {b / a:17.2f}" + ("" if same else "   (rates differ!)"))


def _run(tile_kernels, spectral, plain_tables, route, block, plan, basis):
    spectral.fft_tables = plain_tables if route == "compiled" else (lambda n: None)
    try:
        return tile_kernels.maps_tile_kernel(block, 0, 0, halo=1, plan=plan, basis=basis, gram_bin=None)
    finally:
        spectral.fft_tables = plain_tables


if __name__ == "__main__":
    main()
