"""What a batch is: the config file, the command line and the manifest combined into a
validated :class:`BatchPlan` of :class:`StackItem` s, and the names of their result folders.
"""

from __future__ import annotations

import glob
import os
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from tempofield.engine.options import validate_options, validate_rate_range
from tempofield.errors import InputError
from tempofield.outputs.result import RESULT_FILES

#: Written into ``run.json`` (``input.batch.runner``) so a rerun knows which folders it may replace.
RUNNER_TAG = "tempofield.batch.runner/1"


CONVERTED_DIR = "_converted"


SUMMARY_CSV = "summary.csv"


SUMMARY_PNG = "summary.png"


FAILURES_CSV = "failures.csv"


LOCK_FILE = ".tempofield-batch.lock"


#: Entries a result folder may hold; a folder without run.json holding only these is a partial result.
RESULT_ENTRIES = RESULT_FILES  # the files a result folder may hold (shared with RhythmResult.save)


#: Per-stack overrides a manifest row may carry, with their types (as for open_stack).
OVERRIDES = {"frame_interval_s": float, "pixel_size_um": float, "channel": int, "plane": int}


#: Columns the runner writes to summary.csv; a manifest may not reuse them.
RESERVED_COLUMNS = ("name", "status", "error", "source", "result_folder", "n_frames", "height_px", "width_px",
                    "rhythmic_fraction", "rate_median_bpm", "rate_iqr_bpm", "n_regions", "analysis_s",
                    "tempofield_version")


#: Keys of the [cluster] table: which kind of cluster and its settings.
CLUSTER_KINDS = ("local", "slurm", "pbs")


CLUSTER_KEYS = {
    "kind": str, "scheduler": str, "allowed_failures": int, "dashboard_address": str,
    # local
    "n_workers": int, "threads_per_worker": int, "memory_limit": str,
    # dask-jobqueue (SLURM, PBS)
    "cores": int, "processes": int, "memory": str, "walltime": str, "queue": str, "account": str,
    "jobs": int, "minimum_jobs": int, "maximum_jobs": int, "interface": str, "local_directory": str,
    "log_directory": str, "job_name": str, "python": str, "job_script_prologue": list,
    "job_extra_directives": list, "worker_extra_args": list, "resource_spec": str,
}


JOBQUEUE_PASS_THROUGH = ("cores", "processes", "memory", "walltime", "queue", "account", "interface",
                         "local_directory", "log_directory", "job_name", "python", "job_script_prologue",
                         "job_extra_directives", "worker_extra_args")


BATCH_KEYS = {"inputs": list, "manifest": str, "out": str, "in_flight": int, "report": bool,
              "keep_converted": bool, "frame_interval_s": float, "pixel_size_um": float, "channel": int,
              "plane": int}


class UsageError(InputError):
    """A bad command line, config file or manifest: the batch does not start (exit code 2)."""


@dataclass
class StackItem:
    """One stack of the batch: where it is, its result folder name, overrides and free columns."""

    name: str
    source: str
    overrides: dict = field(default_factory=dict)
    columns: dict = field(default_factory=dict)


@dataclass
class BatchPlan:
    """Everything a batch needs, validated before any cluster starts."""

    out: Path
    items: list[StackItem]
    rate_range_bpm: tuple[float, float]
    options: dict
    cluster: dict
    in_flight: int | None = None
    report: bool = True
    keep_converted: bool = True

    @property
    def parameters(self) -> dict:
        """What ``run.json`` records as ``parameters`` for this batch (the engine's layout)."""
        return {"rate_range_bpm": list(self.rate_range_bpm), **self.options}

    @property
    def free_columns(self) -> list[str]:
        cols: list[str] = []
        for item in self.items:
            cols += [c for c in item.columns if c not in cols]
        return cols


def load_config(path) -> dict:
    """Read a batch config (TOML) and check its tables and keys; relative paths are kept as written.

    Raises
    ------
    UsageError
        If the file is missing, is not TOML, or has an unknown table or key.
    """
    path = Path(path)
    try:
        with path.open("rb") as fh:
            cfg = tomllib.load(fh)
    except FileNotFoundError:
        raise UsageError(f"no such config file: {str(path)!r}.") from None
    except tomllib.TOMLDecodeError as exc:
        raise UsageError(f"{str(path)!r} is not valid TOML: {exc}.") from None
    unknown = set(cfg) - {"batch", "analysis", "cluster"}
    if unknown:
        raise UsageError(f"{str(path)!r}: unknown table(s) {sorted(unknown)}; a batch config has "
                         "[batch], [analysis] and [cluster].")
    for table, keys in (("batch", BATCH_KEYS), ("cluster", CLUSTER_KEYS)):
        _check_table(cfg.get(table, {}), keys, f"{path}: [{table}]")
    cfg["_dir"] = str(path.resolve().parent)
    return cfg


def _check_table(table: dict, keys: dict, where: str) -> None:
    if not isinstance(table, dict):
        raise UsageError(f"{where} must be a table.")
    for key, value in table.items():
        kind = keys.get(key)
        if kind is None:
            raise UsageError(f"{where}: unknown key {key!r}; known keys are {', '.join(sorted(keys))}.")
        ok = isinstance(value, kind) and not (kind is int and isinstance(value, bool))
        if kind is float:
            ok = isinstance(value, (int, float)) and not isinstance(value, bool)
        if not ok:
            raise UsageError(f"{where}: {key} = {value!r} should be a {kind.__name__}.")


def cluster_settings(cfg: dict, args=None) -> dict:
    """The [cluster] table with command-line overrides and checked values."""
    c = dict(cfg.get("cluster", {}))
    if args is not None:
        for key, arg in (("n_workers", "workers"), ("threads_per_worker", "threads_per_worker"),
                         ("jobs", "jobs"), ("kind", "cluster")):
            if getattr(args, arg, None) is not None:
                c[key] = getattr(args, arg)
        if getattr(args, "scheduler", None):
            c["scheduler"] = args.scheduler
    c.setdefault("kind", "local")
    if c["kind"] not in CLUSTER_KINDS:
        raise UsageError(f"[cluster] kind = {c['kind']!r}; use one of {', '.join(CLUSTER_KINDS)} "
                         "(or --scheduler tcp://HOST:PORT for a running cluster).")
    for key in ("n_workers", "threads_per_worker", "cores", "processes", "allowed_failures"):
        if key in c and c[key] < 1:
            raise UsageError(f"[cluster] {key} = {c[key]} must be at least 1.")
    for key in ("jobs", "minimum_jobs", "maximum_jobs"):
        if key in c and c[key] < 0:
            raise UsageError(f"[cluster] {key} = {c[key]} must be 0 or more.")
    if "walltime" in c and not re.fullmatch(r"(\d+-)?\d{1,3}:\d{2}(:\d{2})?", c["walltime"]):
        raise UsageError(f"[cluster] walltime = {c['walltime']!r}; write it as HH:MM:SS, e.g. \"04:00:00\".")
    return c


def build_plan(args, cfg: dict) -> BatchPlan:
    """Combine config, command line and manifest into a validated :class:`BatchPlan`.

    Precedence: option defaults < config file < command line < manifest row
    (the manifest only sets the per-stack overrides of :data:`OVERRIDES`).
    """
    from tempofield.cliargs import options_from_args

    cfg_dir = Path(cfg.get("_dir", "."))
    batch = cfg.get("batch", {})
    cluster = cluster_settings(cfg, args)
    analysis = dict(cfg.get("analysis", {}))
    rate = args.rate_range if args.rate_range is not None else analysis.pop("rate_range_bpm", None)
    analysis.pop("rate_range_bpm", None)
    if rate is None:
        from tempofield.cliargs import DEFAULT_RATE_RANGE

        rate = DEFAULT_RATE_RANGE
    rate_range = validate_rate_range(rate)
    options = validate_options({**analysis, **options_from_args(args)})

    out = args.out or batch.get("out")
    if not out:
        raise UsageError("no output folder: give -o OUT, or out = \"...\" in the [batch] table of the config.")
    out = Path(out) if args.out else cfg_dir / out

    defaults = {k: batch[k] for k in OVERRIDES if k in batch}
    for key, arg in (("frame_interval_s", "frame_interval"), ("pixel_size_um", "pixel_size"),
                     ("channel", "channel"), ("plane", "plane")):
        if getattr(args, arg, None) is not None:
            defaults[key] = getattr(args, arg)

    entries: list[tuple[str, dict, dict]] = []  # (source, overrides, free columns)
    for spec in args.inputs:
        entries += _expand(spec, Path.cwd(), out)
    if args.manifest:
        entries += read_manifest(args.manifest)
    if not args.inputs and not args.manifest:
        for spec in batch.get("inputs", []):
            entries += _expand(str(spec), cfg_dir, out)
        if batch.get("manifest"):
            entries += read_manifest(cfg_dir / batch["manifest"])
    if not entries:
        raise UsageError("no input stacks: give paths or globs (e.g. 'data/*.tif'), a CSV manifest with a "
                         "'path' column, or inputs = [...] / manifest = \"...\" in the [batch] table.")
    names = unique_names([cols.pop("name", None) or stem_name(src) for src, _, cols in entries])
    items = [StackItem(name, src, {**defaults, **ov}, cols) for name, (src, ov, cols) in zip(names, entries)]

    in_flight = args.in_flight if args.in_flight is not None else batch.get("in_flight")
    if in_flight is not None and in_flight < 1:
        raise UsageError(f"in_flight = {in_flight} must be at least 1.")
    return BatchPlan(out=out.resolve(), items=items, rate_range_bpm=rate_range, options=options,
                     cluster=cluster, in_flight=in_flight,
                     report=batch.get("report", True) and not args.no_report,
                     keep_converted=batch.get("keep_converted", True))


def _expand(spec: str, base: Path, out: Path) -> list[tuple[str, dict, dict]]:
    """One command-line / config input: a CSV manifest, a glob, or a path."""
    if spec.lower().endswith(".csv"):
        return read_manifest(base / spec)
    path = base / os.path.expanduser(spec)
    if glob.has_magic(spec):
        out_res = out.resolve()
        hits = [Path(p) for p in sorted(glob.glob(str(path), recursive=True))]
        hits = [p for p in hits if not p.name.startswith(".") and out_res not in p.resolve().parents]
        if not hits:
            raise UsageError(f"the pattern {spec!r} matches no files (looked in {str(base)!r}); "
                             "quote it so the shell does not expand it, and check the folder.")
        return [(str(p.resolve()), {}, {}) for p in hits]
    # A missing listed path becomes a failed stack, not a failed batch.
    return [(str(path.resolve()) if path.exists() else str(path), {}, {})]


def read_manifest(path) -> list[tuple[str, dict, dict]]:
    """Read a CSV manifest: column ``path`` (relative to the manifest), optional ``name``,
    optional overrides (:data:`OVERRIDES`), and free columns kept for the summary.

    Raises
    ------
    UsageError
        If the file is missing or unreadable, has no ``path`` column, reuses a
        column name of the summary, or an override cell is not a number.
    """
    path = Path(path)
    try:
        table = pd.read_csv(path, dtype=str, keep_default_na=False, skipinitialspace=True)
    except FileNotFoundError:
        raise UsageError(f"no such manifest: {str(path)!r}.") from None
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise UsageError(f"cannot read the manifest {str(path)!r} as CSV: {exc}.") from None
    table.columns = [str(c).strip() for c in table.columns]
    if "path" not in table.columns:
        raise UsageError(f"the manifest {str(path)!r} has no 'path' column (columns: {list(table.columns)}); "
                         "the first line must name the columns, e.g. path,well,condition.")
    clash = [c for c in table.columns if c in RESERVED_COLUMNS and c != "name"]
    if clash:
        raise UsageError(f"the manifest {str(path)!r} uses column name(s) {clash} that the summary writes "
                         "itself; rename them (e.g. 'my_status').")
    base = path.resolve().parent
    entries = []
    for i, row in table.iterrows():
        line = i + 2  # header is line 1
        src = row["path"].strip()
        if not src:
            raise UsageError(f"{str(path)!r} line {line}: empty 'path'.")
        p = base / os.path.expanduser(src)
        overrides = {}
        for key, kind in OVERRIDES.items():
            cell = row.get(key, "").strip() if key in table.columns else ""
            if cell:
                try:
                    value = kind(float(cell)) if kind is int and float(cell).is_integer() else kind(cell)
                except ValueError:
                    raise UsageError(f"{str(path)!r} line {line}: {key} = {cell!r} is not "
                                     f"{'an integer' if kind is int else 'a number'}.") from None
                overrides[key] = value
        cols = {c: row[c] for c in table.columns if c not in OVERRIDES and c != "path"}
        if not cols.get("name"):
            cols.pop("name", None)
        entries.append((str(p.resolve()) if p.exists() else str(p), overrides, cols))
    return entries


_SUFFIXES = re.compile(r"(\.ome)?\.(tiff?|btf|tf8|zarr|avi|mp4|mov|mkv|m4v|webm)$", re.IGNORECASE)


def stem_name(source: str) -> str:
    """A result-folder name from a stack path: the file name without its image suffixes."""
    name = _SUFFIXES.sub("", Path(source.rstrip("/\\")).name) or "stack"
    name = re.sub(r"[^A-Za-z0-9._-]+", "_", name).strip("._-")
    return name or "stack"


def unique_names(names: list[str]) -> list[str]:
    """De-duplicate folder names in input order (``x``, ``x-2``, ...), case-insensitively."""
    seen: set[str] = set()
    out = []
    for name in names:
        name = re.sub(r"[^A-Za-z0-9._-]+", "_", str(name)).strip("._-") or "stack"
        cand, k = name, 1
        while cand.lower() in seen:
            k += 1
            cand = f"{name}-{k}"
        seen.add(cand.lower())
        out.append(cand)
    return out
