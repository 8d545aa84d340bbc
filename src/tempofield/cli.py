"""The ``tempofield`` command: analyse a stack, run the demo, convert to OME-Zarr, make samples.

Every analysis option comes from :data:`tempofield.engine.options.OPTIONS`, so the
command line, the napari panel and the runner cannot drift apart. Errors the
user can fix end the program with exit code 2 and one paragraph, never a
traceback; the engine's messages name Python arguments (``frame_interval_s``),
which :func:`in_command_line_words` turns into this command's flags
(``--frame-interval``) before they are printed.

Ctrl-C, SIGTERM (a job scheduler's or ``kill``'s stop) and SIGHUP (a closed
terminal) end a run alike: the engine stops at its next tile, its temporary
files go, no partial result folder is left, one line says so, and the exit
code is 128 plus the signal's number (130, 143, 129).

Only light modules are imported here; the numerical ones (numpy, dask,
numba) load inside :func:`main`, where an early Ctrl-C ends quietly.
"""

from __future__ import annotations

import contextlib
import os
import re
import signal
import sys
import time
from pathlib import Path

from tempofield.errors import CancelledError, InputError, TempofieldError
from tempofield.outputs.texts import CAUTION

#: Python arguments of the engine that have a flag of another name on the command line
#: (the analysis options' flags come from the option table, see :func:`command_line_flags`).
ARGUMENT_FLAGS = {
    "frame_interval_s": "--frame-interval",
    "pixel_size_um": "--pixel-size",
    "rate_range_bpm": "--rate-range",
    "channel": "--channel",
    "plane": "--plane",
    "overwrite": "--overwrite",
}


def command_line_flags() -> dict[str, str]:
    """Every Python argument name with its command-line flag: the analysis options' and :data:`ARGUMENT_FLAGS`."""
    from tempofield.cliargs import flag_of
    from tempofield.engine.options import OPTIONS

    flags = {o.name: flag_of(o.name) for o in OPTIONS if o.cli}
    flags.update(ARGUMENT_FLAGS)
    return flags


# A Python value as messages print it: a quoted string, a tuple or list, or one word or number.
_VALUE = r"""'[^']*'|"[^"]*"|\([^()]*\)|\[[^\[\]]*\]|[^\s,;()\[\]'"]*[^\s,;()\[\]'".:]"""


def in_command_line_words(message: str) -> str:
    """A message of the engine in the words of the command line: Python names become flags.

    ``name=value`` becomes ``--flag value`` (a tuple's numbers separated by
    spaces, a string without its quotes, ``True``/``False`` of an on/off
    option its ``--flag``/``--no-flag``); a bare name with an underscore
    becomes ``--flag``. Plain words that are also arguments (``channel``,
    ``plane``) are changed only in the ``name=value`` form.

    Examples
    --------
    >>> in_command_line_words("rate_range_bpm=(20.0, 900.0) is too high; memory_budget_mb must be larger.")
    '--rate-range 20 900 is too high; --memory-budget-mb must be larger.'
    >>> in_command_line_words("choose one with channel=N; the first channel is 0.")
    'choose one with --channel N; the first channel is 0.'
    """
    flags = command_line_flags()
    names = "|".join(sorted(map(re.escape, flags), key=len, reverse=True))
    pattern = re.compile(rf"(?<![\w./\\-])({names})(?:=({_VALUE}))?(?![\w/\\-])")

    def swap(m: re.Match) -> str:
        name, value = m.group(1), m.group(2)
        flag = flags[name]
        if value is None:
            return flag if "_" in name else m.group(0)
        return _flag_with_value(flag, value)

    return pattern.sub(swap, message)


def _flag_with_value(flag: str, text: str) -> str:
    import ast
    import shlex

    try:
        value = ast.literal_eval(text)
    except (ValueError, SyntaxError, TypeError, MemoryError, RecursionError):
        return f"{flag} {text}"  # a placeholder such as N, or a word
    if isinstance(value, bool):
        return flag if value else "--no-" + flag[2:]

    def word(v) -> str:
        if isinstance(v, float):
            return f"{v:g}"
        if isinstance(v, str):
            return shlex.quote(v) if v else "''"
        return str(v)

    if isinstance(value, (tuple, list)):
        return " ".join([flag, *map(word, value)])
    return f"{flag} {word(value)}"


class _Stopped(KeyboardInterrupt):
    """A signal ended the program; ``signum`` is which. A KeyboardInterrupt, so no ``except Exception`` keeps it."""

    def __init__(self, signum: int):
        super().__init__(signum)
        self.signum = signum


class _EndingSignals:
    """Ctrl-C (SIGINT), SIGTERM and SIGHUP end the command cleanly.

    While the numerical modules are imported and while the engine runs
    (:meth:`deferred`), a signal only sets a flag: the engine polls it
    (``cancel=``) after every tile and between its stages, then stops, removes
    its temporary files and raises CancelledError; after the imports it is
    checked once. Raising at an arbitrary point there is not safe: an
    exception that lands inside Python's import machinery can leave the
    import lock held while the engine's background threads import (seen:
    Ctrl-C as the maps pass started hung the program for good), or be printed
    and lost in a clean-up callback. Elsewhere (opening the stack, writing the
    result, converting) a signal raises :class:`_Stopped` at once, and the
    folder being written is removed. A second signal always raises at once.
    """

    NAMES = ("SIGINT", "SIGTERM", "SIGHUP")

    def __init__(self):
        self.signum: int | None = None
        self.waiting = False
        self.previous: dict = {}

    def install(self) -> None:
        self.signum, self.waiting = None, False
        for name in self.NAMES:
            sig = getattr(signal, name, None)
            if sig is None:  # no SIGHUP on Windows
                continue
            try:
                self.previous[sig] = signal.signal(sig, self._handle)
            except (ValueError, OSError):  # not the main thread: leave the signals alone
                pass

    def restore(self) -> None:
        for sig, handler in self.previous.items():
            with contextlib.suppress(ValueError, OSError, TypeError):
                signal.signal(sig, handler)
        self.previous = {}

    def _handle(self, signum, frame) -> None:
        if self.signum is None:
            self.signum = signum
            if self.waiting:
                return  # acted on at the end of the deferred block, or by the engine at its next tile
        raise _Stopped(signum)

    def cancelled(self) -> bool:
        """The engine's ``cancel`` callback: True once a signal came."""
        return self.signum is not None

    @contextlib.contextmanager
    def deferred(self):
        """Within this block a first signal only sets the flag; at its end, a signal that came raises."""
        outer = self.waiting
        self.waiting = True
        try:
            yield
        finally:
            self.waiting = outer
        if self.signum is not None and not outer:  # came during the block (after the engine's last check)
            raise _Stopped(self.signum)


_SIGNALS = _EndingSignals()


def _ending_message(signum: int) -> str:
    if signum == signal.SIGINT:
        return "tempofield: interrupted (Ctrl-C); the run was stopped and no partial result was left behind."
    name = signal.Signals(signum).name
    return f"tempofield: stopped by {name}; the run was ended and no partial result was left behind."


def build_parser():
    import argparse

    from tempofield.cliargs import CHANNEL_HELP, PLANE_HELP, add_analysis_arguments

    parser = argparse.ArgumentParser(
        prog="tempofield", description="Maps of where rhythmic tissue beats, how fast, how regularly and in "
                                     "which order. " + CAUTION)
    from tempofield._version import __version__

    parser.add_argument("--version", action="version", version=f"tempofield {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)

    a = sub.add_parser("analyze", help="analyse one stack and write a result folder")
    a.add_argument("stack", help="TIFF / OME-TIFF / ImageJ file, a folder of single-frame TIFF files (or a "
                                 "quoted pattern such as 'frames/*.tif'), a Zarr or OME-Zarr folder, or a video")
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
    c.add_argument("--frame-interval", type=float, metavar="S",
                   help="seconds between frames (overrides the file's metadata; required if it has none)")
    c.add_argument("--pixel-size", type=float, metavar="UM", help="pixel edge in micrometres")
    c.add_argument("--channel", type=int, metavar="N", help=CHANNEL_HELP)
    c.add_argument("--plane", type=int, metavar="N", help=PLANE_HELP)
    c.add_argument("--overwrite", action="store_true", help="replace an earlier converted stack")

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


#: The modules each command needs, imported up front under :meth:`_EndingSignals.deferred`
#: (numpy, dask and numba come with them: one to two seconds).
_MODULES = {
    "analyze": ("tempofield.engine.run", "tempofield.engine.stack", "tempofield.io.atomic",
                "tempofield.outputs.report", "tempofield.outputs.result"),
    "convert": ("tempofield.engine.convert",),
}
_MODULES["demo"] = _MODULES["analyze"]


def _load_modules(command: str) -> None:
    import importlib

    for name in _MODULES.get(command, ()):
        importlib.import_module(name)


def run_analysis(stack_path, out, *, frame_interval_s=None, pixel_size_um=None, rate_range_bpm=None,
                 channel=None, plane=None, overwrite=False, progress=None, options=None):
    """Open, analyse and save one stack; the shared path of ``analyze`` and ``demo``.

    Every check of the output folder comes before the analysis, so a run that
    could not be saved does not start. A signal during the analysis stops the
    engine at its next tile (see :class:`_EndingSignals`).
    """
    from tempofield.engine.run import analyze
    from tempofield.engine.stack import open_stack
    from tempofield.outputs.result import ResultExistsError

    out = Path(out).resolve()
    if out.exists() and not overwrite:  # fail before the work, not after it
        if not out.is_dir():
            raise InputError(f"{str(out)!r} is a file, not a folder; nothing was written. Give -o the name of a "
                             "result folder to create.")
        raise ResultExistsError(
            f"{str(out)!r} already exists; nothing was written. Choose another folder with -o, or add "
            "--overwrite to replace it.")
    stack = open_stack(stack_path, frame_interval_s, pixel_size_um, channel=channel, plane=plane)
    from tempofield.io.atomic import check_replaceable
    from tempofield.outputs.result import is_result_folder

    check_replaceable(out, is_result_folder, "tempofield result folder", protect=stack.input_paths())
    parent = next((p for p in [out.parent, *out.parent.parents] if p.exists()), None)
    if parent is None or not os.access(parent, os.W_OK):
        raise InputError(f"cannot write {str(out)!r}: {str(parent)!r} is not writable. Choose another -o folder.")
    with _SIGNALS.deferred():
        result = analyze(stack, rate_range_bpm, progress=progress, cancel=_SIGNALS.cancelled, **(options or {}))
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
    from tempofield._version import __version__

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
    """Run the ``tempofield`` command; returns its exit code (0 done, 2 a problem the user can fix,
    128 + the signal's number when Ctrl-C, SIGTERM or SIGHUP ended it)."""
    argv = sys.argv[1:] if argv is None else list(argv)
    if argv[:1] == ["batch"]:  # the batch runner has its own options, and its own handling of signals
        from tempofield.batch.runner import main as batch_main

        return batch_main(argv[1:])
    _SIGNALS.install()
    try:
        return _main(argv)
    except _Stopped as stop:
        print(_ending_message(stop.signum), file=sys.stderr)
        return 128 + stop.signum
    except KeyboardInterrupt:  # a Ctrl-C that came before the handlers were in place
        print(_ending_message(signal.SIGINT), file=sys.stderr)
        return 128 + signal.SIGINT
    finally:
        _SIGNALS.restore()


def _main(argv: list[str]) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        with _SIGNALS.deferred():
            _load_modules(args.command)
        if args.command == "analyze":
            from tempofield.cliargs import options_from_args

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
    except CancelledError as exc:
        if _SIGNALS.signum is not None:  # the engine stopped because a signal came
            raise _Stopped(_SIGNALS.signum) from None
        print(f"tempofield: error: {exc}", file=sys.stderr)
        return 2
    except TempofieldError as exc:
        print(f"tempofield: error: {in_command_line_words(str(exc))}", file=sys.stderr)
        return 2
    except OSError as exc:  # unwritable folder, full disk, unreadable file: the user's to fix
        print(f"tempofield: error: {exc.strerror or exc}: {exc.filename or ''}. Nothing was left half-written; "
              "check the path, its permissions and the free space.", file=sys.stderr)
        return 2
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
