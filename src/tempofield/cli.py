"""The ``tempofield`` command: analyse a stack, run the demo, convert to OME-Zarr, make samples.

Every analysis option comes from :data:`tempofield.engine.options.OPTIONS`, so the
command line, the napari panel and the runner cannot drift apart. Errors the
user can fix end the program with exit code 2 and one paragraph, never a
traceback.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

from tempofield import __version__
from tempofield.cliargs import add_analysis_arguments, options_from_args
from tempofield.errors import InputError, TempofieldError
from tempofield.outputs.texts import CAUTION


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="tempofield", description="Maps of where rhythmic tissue beats, how fast, how regularly and in "
                                     "which order. " + CAUTION)
    parser.add_argument("--version", action="version", version=f"tempofield {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)

    a = sub.add_parser("analyze", help="analyse one stack and write a result folder")
    a.add_argument("stack", help="TIFF / OME-TIFF / ImageJ file, Zarr or OME-Zarr folder, or video")
    a.add_argument("-o", "--out", required=True, help="result folder to create")
    a.add_argument("--overwrite", action="store_true", help="replace an existing result folder")
    a.add_argument("--quiet", action="store_true", help="no progress bar")
    add_analysis_arguments(a)

    d = sub.add_parser("demo", help="analyse the shipped sample stack and print where the results are")
    d.add_argument("-o", "--out", default="tempofield-demo", help="result folder (default ./tempofield-demo)")
    d.add_argument("--overwrite", action="store_true", help="replace an existing demo result")

    c = sub.add_parser("convert", help="convert a stack to OME-Zarr with the whole time axis in each chunk")
    c.add_argument("stack")
    c.add_argument("out", help="folder to create, e.g. stack.ome.zarr")
    c.add_argument("--frame-interval", type=float, metavar="S")
    c.add_argument("--pixel-size", type=float, metavar="UM")
    c.add_argument("--channel", type=int)
    c.add_argument("--plane", type=int)
    c.add_argument("--overwrite", action="store_true")

    sub.add_parser("batch", help="analyse many stacks on a dask cluster (options: tempofield batch --help; "
                                 "see runner/README.md)", add_help=False)

    m = sub.add_parser("make-samples", help="regenerate the synthetic sample stacks and their ground truth")
    m.add_argument("folder", nargs="?", default="sample_stacks")
    return parser


class _Bar:
    """A terminal progress bar over the analysis ticks (stderr, so stdout stays parseable)."""

    def __init__(self, enabled: bool):
        self.enabled = enabled
        self.bar = None
        self.stage = None

    def __call__(self, done, total, stage):
        if not self.enabled:
            return
        from tqdm import tqdm

        if stage != self.stage and stage != "done":
            if self.bar is not None:
                self.bar.close()
            self.bar = tqdm(total=total, desc=stage, unit="tile", file=sys.stderr, leave=False)
            self.stage = stage
        if self.bar is not None:
            self.bar.n = done
            self.bar.refresh()

    def close(self):
        if self.bar is not None:
            self.bar.close()


def run_analysis(stack_path, out, *, frame_interval_s=None, pixel_size_um=None, rate_range_bpm=None,
                 channel=None, plane=None, overwrite=False, progress=None, options=None):
    """Open, analyse and save one stack; the shared path of ``analyze`` and ``demo``."""
    from tempofield.engine.run import analyze
    from tempofield.engine.stack import open_stack
    from tempofield.outputs.result import ResultExistsError

    out = Path(out).resolve()
    if out.exists() and not overwrite:  # fail before the work, not after it
        raise ResultExistsError(
            f"{str(out)!r} already exists; nothing was written. Choose another folder with -o, or add "
            "--overwrite to replace it.")
    stack = open_stack(stack_path, frame_interval_s, pixel_size_um, channel=channel, plane=plane)
    from tempofield.io.atomic import check_replaceable
    from tempofield.outputs.result import is_result_folder

    check_replaceable(out, is_result_folder, "tempofield result folder",
                      protect=[stack.source] if stack.source != "array" else [])
    parent = next((p for p in [out.parent, *out.parent.parents] if p.exists()), None)
    if parent is None or not os.access(parent, os.W_OK):
        raise InputError(f"cannot write {str(out)!r}: {str(parent)!r} is not writable. Choose another -o folder.")
    result = analyze(stack, rate_range_bpm, progress=progress, **(options or {}))
    from tempofield.outputs.report import report_writers

    writers = report_writers(result, stack)
    if result.parameters.get("magnified_preview"):
        from tempofield.outputs.report import preview_writer

        writers.update(preview_writer(result, stack))
    result.save(out, overwrite=overwrite, extra_files=writers)
    return result


SUMMARY_COLUMNS = ("region", "area_px", "rate_median_bpm", "beats", "beat_interval_cv", "loop_score",
                   "coherence_mean", "conduction_velocity_um_s", "conduction_velocity_px_s", "wave_direction_deg",
                   "origin_y_um", "origin_x_um", "origin_y_px", "origin_x_px")


def print_summary(result, out, stream=sys.stdout) -> None:
    """What a run found, region by region (rates are never pooled across regions)."""
    s = result.summary()
    lines = [f"tempofield {__version__}: results written to {Path(out).resolve()}",
             f"  frames {result.input.get('shape', ['?'])[0]} x {result.shape[0]} x {result.shape[1]} px, "
             f"frame interval {result.frame_interval_s:g} s"]
    table = result.region_table
    if table is None or not len(table):
        lines.append("  no beating region found (no group of rhythmic pixels of at least --min-area-px); "
                     "no rate is reported")
    else:
        in_regions = float((result.regions > 0).mean())
        lines.append(f"  {len(table)} beating region(s), {100 * in_regions:.1f} % of the field "
                     f"({100 * s['rhythmic_fraction']:.1f} % of pixels rhythmic)")
        unit, per = (("Hz", 60.0) if result.rate_unit == "Hz" else ("bpm", 1.0))
        for _, row in table.iterrows():
            lines.append(f"  region {int(row['region'])}: rate {row['rate_median_bpm'] / per:.{4 if per > 1 else 2}f} "
                         f"{unit} (median, IQR {row['rate_iqr_bpm'] / per:.{4 if per > 1 else 2}f}), "
                         f"{int(row['area_px'])} px")
        from tempofield.outputs.result import in_rate_unit

        table = in_rate_unit(table, result.rate_unit)
        cols = [c for c in SUMMARY_COLUMNS + ("rate_median_hz",) if c in table.columns]
        lines.append("  regions (all columns in regions.csv):")
        lines.append("    " + table[cols].head(20).to_string(index=False, float_format=lambda v: f"{v:.4g}",
                                                             na_rep="-").replace("\n", "\n    "))
        if any(c.startswith("wave_direction") for c in cols):
            lines.append("  (wave direction: degrees counter-clockwise from +x, y down the rows: +90 is down the image)")
    for label, ref in sorted(result.references.items()):
        mean_rate = (f"{ref.rate_mean_bpm / 60:.3f} Hz" if result.rate_unit == "Hz"
                     else f"{ref.rate_mean_bpm:.2f} bpm")
        lines.append(f"  reference {label}: loop score {ref.score:.2f}, {len(ref.beat_times_s)} beats, "
                     f"mean rate {mean_rate}, beat-interval CV {ref.interval_cv:.3f}, "
                     f"phase from the {ref.method}")
    for w in result.parameters.get("warnings", []):
        lines.append(f"  warning: {w}")
    source = str(result.parameters.get("phase_source", ""))
    if source.startswith("second read"):  # the slower route: say why the stack was read twice
        lines.append(f"  phase from a {source}")
    lines.append(f"  took {result.timings.get('total_s', float('nan')):.1f} s")
    lines.append("  " + CAUTION)
    print("\n".join(lines), file=stream)


def find_sample(name="well_sheet.tif") -> Path:
    """The shipped sample stack: in ./sample_stacks, beside the source tree, or made afresh."""
    here = Path(__file__).resolve()
    for folder in (Path.cwd() / "sample_stacks", here.parents[2] / "sample_stacks"):
        if (folder / name).exists():
            return folder / name
    import tempfile

    from tempofield.scenes.samples import write_samples

    folder = Path(tempfile.mkdtemp(prefix="tempofield-samples-"))
    write_samples(folder)
    return folder / name


def _convert(args) -> None:
    from tempofield.engine.convert import convert_stack

    out = convert_stack(args.stack, args.out, frame_interval_s=args.frame_interval,
                        pixel_size_um=args.pixel_size, channel=args.channel, plane=args.plane,
                        overwrite=args.overwrite)
    print(f"wrote {out}")


def main(argv=None) -> int:
    argv = sys.argv[1:] if argv is None else list(argv)
    if argv[:1] == ["batch"]:  # the batch runner has its own options
        from tempofield.batch.runner import main as batch_main

        return batch_main(argv[1:])
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        if args.command == "analyze":
            bar = _Bar(not args.quiet and sys.stderr.isatty())
            try:
                result = run_analysis(args.stack, args.out, frame_interval_s=args.frame_interval,
                                      pixel_size_um=args.pixel_size, rate_range_bpm=args.rate_range,
                                      channel=args.channel, plane=args.plane, overwrite=args.overwrite,
                                      progress=bar, options=options_from_args(args))
            finally:
                bar.close()
            print_summary(result, args.out)
        elif args.command == "demo":
            sample = find_sample()
            print(f"analysing the sample stack {sample} (a synthetic culture well; see sample_stacks/README.md)")
            t0 = time.perf_counter()
            result = run_analysis(sample, args.out, rate_range_bpm=(20, 150), overwrite=args.overwrite,
                                  progress=_Bar(sys.stderr.isatty()))
            print_summary(result, args.out)
            print(f"  demo wall time {time.perf_counter() - t0:.1f} s")
        elif args.command == "convert":
            _convert(args)
        elif args.command == "make-samples":
            from tempofield.scenes.samples import write_samples

            for path in write_samples(Path(args.folder)):
                print(f"wrote {path}")
    except TempofieldError as exc:
        print(f"tempofield: error: {exc}", file=sys.stderr)
        return 2
    except OSError as exc:  # unwritable folder, full disk, unreadable file: the user's to fix
        print(f"tempofield: error: {exc.strerror or exc}: {exc.filename or ''}. Nothing was left half-written; "
              "check the path, its permissions and the free space.", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("tempofield: interrupted; no partial result was left behind.", file=sys.stderr)
        return 130
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
