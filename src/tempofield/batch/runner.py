"""Batch runner: analyse a whole experiment on a dask.distributed cluster.

One command takes a glob, a list of paths or a CSV manifest, one TOML config
(analysis options from :data:`rhythmap.options.OPTIONS`, a rate band, a
``[cluster]`` table) and an output folder, and writes one result folder per
stack plus ``summary.csv``, ``summary.png`` and ``failures.csv``. The cluster is
dask's own: a :class:`distributed.LocalCluster` of worker processes by default,
an existing scheduler (``--scheduler`` or ``DASK_SCHEDULER_ADDRESS``), or SLURM
/ PBS jobs through dask-jobqueue. Scheduling, retries and re-assignment after a
lost worker are dask's; this module only decides what needs doing.

Each stack is opened here (metadata only), TIFF and video inputs are converted
to OME-Zarr on a worker (a TIFF-backed dask array cannot travel between
processes), and :func:`rhythmap.analyze` then runs its tile graph on the
workers through the default client, so one stack's chunks are computed in
parallel and several stacks are in flight at once. A result folder is written
beside its place and renamed (``RhythmResult.save``), so it is complete or
absent; a rerun skips a stack whose folder is complete and whose ``run.json``
holds the same parameters and input identity, and redoes stale or partial ones.

Only :mod:`rhythmap`'s public API, :mod:`rhythmap.options`,
:func:`rhythmap.convert.convert_stack`, :func:`rhythmap.result.is_complete`
and the shared command-line arguments of :mod:`rhythmap.cli` are used.
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import glob
import hashlib
import json
import os
import re
import shutil
import signal
import socket
import sys
import threading
import time
import tomllib
import uuid
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from . import __version__, analyze, open_stack
from .errors import InputError, RhythmapError
from .options import validate_options, validate_rate_range
from .result import REGIONS_FILE, RESULT_FILES, RUN_FILE, is_complete

#: Written into ``run.json`` (``input.batch.runner``) so a rerun knows which folders it may replace.
RUNNER_TAG = "rhythmap.batch/1"

CONVERTED_DIR = "_converted"
SUMMARY_CSV = "summary.csv"
SUMMARY_PNG = "summary.png"
FAILURES_CSV = "failures.csv"
LOCK_FILE = ".rhythmap-batch.lock"

#: Entries a result folder may hold; a folder without run.json holding only these is a partial result.
RESULT_ENTRIES = RESULT_FILES  # the files a result folder may hold (shared with RhythmResult.save)

#: Per-stack overrides a manifest row may carry, with their types (as for open_stack).
OVERRIDES = {"frame_interval_s": float, "pixel_size_um": float, "channel": int, "plane": int}

#: Columns the runner writes to summary.csv; a manifest may not reuse them.
RESERVED_COLUMNS = ("name", "status", "error", "source", "result_folder", "n_frames", "height_px", "width_px",
                    "rhythmic_fraction", "rate_median_bpm", "rate_iqr_bpm", "n_regions", "analysis_s",
                    "rhythmap_version")

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


# ============================================================================ configuration
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
    from .cli import options_from_args

    cfg_dir = Path(cfg.get("_dir", "."))
    batch = cfg.get("batch", {})
    cluster = cluster_settings(cfg, args)
    analysis = dict(cfg.get("analysis", {}))
    rate = args.rate_range if args.rate_range is not None else analysis.pop("rate_range_bpm", None)
    analysis.pop("rate_range_bpm", None)
    if rate is None:
        from .cli import DEFAULT_RATE_RANGE

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


# ============================================================================ resumability
def _normal(obj):
    """A JSON round trip, so values compare as they are stored in run.json."""
    return json.loads(json.dumps(obj, default=_json_default))


def _json_default(o):
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, Path):
        return str(o)
    raise TypeError(f"cannot store {type(o).__name__} in JSON")


def folder_state(dest: Path, parameters: dict, source_identity: dict) -> str:
    """What is at a stack's result folder.

    Returns one of ``"absent"``; ``"finished"`` (complete, same parameters and
    input: skip); ``"stale"`` (complete, made by this runner, but for other
    parameters or another version of the input: redo); ``"partial"`` (no
    run.json, only result files in it: redo); ``"foreign"`` (anything else:
    left untouched and reported).
    """
    if not dest.exists():
        return "absent"
    if not dest.is_dir():
        return "foreign"
    if not is_complete(dest):
        entries = {p.name for p in dest.iterdir()}
        return "partial" if entries <= RESULT_ENTRIES else "foreign"
    try:
        rec = json.loads((dest / RUN_FILE).read_text())
    except (OSError, ValueError):
        return "foreign"
    stored_input = rec.get("input") or {}
    batch = stored_input.get("batch") or {}
    stored_identity = batch.get("source_identity", stored_input.get("identity"))
    stored_params = rec.get("parameters") or {}
    current = _normal(parameters)
    same = (all(k in stored_params and stored_params[k] == v for k, v in current.items())
            and _normal(stored_identity) == _normal(source_identity))
    if same:
        return "finished"
    return "stale" if batch.get("runner") == RUNNER_TAG else "foreign"


def _identity_hash(identity: dict) -> str:
    return hashlib.sha1(json.dumps(_normal(identity), sort_keys=True).encode()).hexdigest()[:10]


def _needs_conversion(source: str) -> bool:
    p = Path(source)
    return not (p.is_dir() or p.name.lower().endswith(".zarr"))


def convert_cached(source: str, dest: str, overrides: dict) -> str:
    """Convert ``source`` to OME-Zarr at ``dest`` unless a finished copy is already there.

    Runs on a worker. ``convert_stack`` writes beside and renames, so an
    existing ``dest`` is complete; this makes the task safe to run again when
    dask re-runs it after a lost worker.
    """
    from .convert import convert_stack

    if not Path(dest).exists():
        try:
            convert_stack(source, dest, **overrides)
        except FileExistsError:
            pass  # another attempt of this same task finished first
    return dest


# ============================================================================ cluster
class Connection:
    """A client on the batch's cluster, and the cluster if the runner started it."""

    def __init__(self, client, cluster=None, expected_threads: int = 1, description: str = ""):
        self.client = client
        self.cluster = cluster
        self.expected_threads = expected_threads
        self.description = description

    @property
    def dashboard(self) -> str | None:
        try:
            services = self.client.scheduler_info().get("services", {})
        except Exception:  # noqa: BLE001 - informational only
            return None
        return self.client.dashboard_link if "dashboard" in services else None

    def close(self):
        with contextlib.suppress(Exception):
            self.client.close(timeout=10)
        if self.cluster is not None:
            with contextlib.suppress(Exception):
                self.cluster.close(timeout=10)


def make_jobqueue_cluster(settings: dict):
    """A dask-jobqueue SLURMCluster or PBSCluster from the [cluster] table; no job is submitted.

    ``cluster.job_script()`` shows the batch script each job will run.
    """
    kind = settings["kind"]
    try:
        import dask_jobqueue
    except ImportError:
        raise UsageError(f"[cluster] kind = {kind!r} needs dask-jobqueue: pip install 'rhythmap[cluster]'.") from None
    missing = [k for k in ("cores", "memory") if k not in settings]
    if missing:
        raise UsageError(f"[cluster] kind = {kind!r} needs {' and '.join(missing)} (per job), "
                         "e.g. cores = 8 and memory = \"32GB\".")
    kwargs = {k: settings[k] for k in JOBQUEUE_PASS_THROUGH if k in settings}
    kwargs.setdefault("job_name", "rhythmap")
    kwargs.setdefault("python", sys.executable)
    kwargs["scheduler_options"] = {"dashboard_address": settings.get("dashboard_address", ":8787")}
    if kind == "pbs":
        if "resource_spec" in settings:
            kwargs["resource_spec"] = settings["resource_spec"]
        return dask_jobqueue.PBSCluster(**kwargs)
    return dask_jobqueue.SLURMCluster(**kwargs)


def connect(settings: dict) -> Connection:
    """Start or join the cluster described by ``settings`` and return a default client on it.

    Order: an explicit scheduler address (``--scheduler`` or ``[cluster]
    scheduler``), then ``DASK_SCHEDULER_ADDRESS``, then ``kind`` (local,
    slurm, pbs).
    """
    import dask
    from distributed import Client, LocalCluster

    address = settings.get("scheduler") or os.environ.get("DASK_SCHEDULER_ADDRESS") \
        or dask.config.get("scheduler-address", None)
    if "allowed_failures" in settings:
        dask.config.set({"distributed.scheduler.allowed-failures": settings["allowed_failures"]})
    if address:
        try:
            client = Client(address, timeout="30s")
        except (OSError, TimeoutError) as exc:
            raise UsageError(f"cannot reach the dask scheduler at {address!r}: {exc}. Is it running? "
                             "Check the address (tcp://HOST:PORT) and DASK_SCHEDULER_ADDRESS.") from None
        threads = sum(client.nthreads().values()) or 1
        return Connection(client, None, threads, f"scheduler {address}")
    kind = settings["kind"]
    if kind == "local":
        n = settings.get("n_workers", max(1, (os.cpu_count() or 2) // settings.get("threads_per_worker", 1)))
        tpw = settings.get("threads_per_worker", 1)
        kwargs = dict(n_workers=n, threads_per_worker=tpw, processes=True,
                      dashboard_address=settings.get("dashboard_address", ":0"))
        if "memory_limit" in settings:
            kwargs["memory_limit"] = settings["memory_limit"]
        cluster = LocalCluster(**kwargs)
        return Connection(Client(cluster), cluster, n * tpw, f"local cluster, {n} worker processes x {tpw} thread(s)")
    cluster = make_jobqueue_cluster(settings)
    if "minimum_jobs" in settings or "maximum_jobs" in settings:
        cluster.adapt(minimum_jobs=settings.get("minimum_jobs", 0),
                      maximum_jobs=settings.get("maximum_jobs", settings.get("jobs", 1)))
    else:
        cluster.scale(jobs=settings.get("jobs", 1))
    jobs = settings.get("maximum_jobs", settings.get("jobs", 1))
    return Connection(Client(cluster), cluster, max(1, jobs * settings["cores"]),
                      f"{kind.upper()} jobs via dask-jobqueue ({jobs} x {settings['cores']} cores)")


# ============================================================================ running
@dataclass
class Outcome:
    """What happened to one stack in this run."""

    item: StackItem
    status: str  # "done", "reused" or "failed"
    error: str = ""
    seconds: float = 0.0


class _Bars:
    """Terminal progress on stderr: stacks finished, and tiles computed over all stacks in flight."""

    def __init__(self, n_stacks: int, enabled: bool):
        self.lock = threading.Lock()
        self.stacks = self.tiles = None
        self.seen: dict[tuple[str, str], int] = {}
        if enabled:
            from tqdm import tqdm

            interval = 0.2 if sys.stderr.isatty() else 30.0  # job logs: a line now and then
            self.stacks = tqdm(total=n_stacks, desc="stacks", unit="stack", file=sys.stderr, position=0,
                               mininterval=interval, dynamic_ncols=True)
            self.tiles = tqdm(total=0, desc="tiles", unit="tile", file=sys.stderr, position=1,
                              mininterval=interval, dynamic_ncols=True, leave=False)

    def on_event(self, event):
        """Handler of the batch's dask event topic: ``(time, {name, attempt, stage, done, total})``."""
        msg = event[1]
        if self.tiles is None or msg.get("stage") == "done":
            return
        with self.lock:
            key = (msg["name"], msg["attempt"], msg["stage"])
            if key not in self.seen:
                self.seen[key] = 0
                self.tiles.total += msg["total"]
                self.tiles.refresh()
            self.tiles.update(msg["done"] - self.seen[key])
            self.seen[key] = msg["done"]

    def stack_done(self, n_failed: int):
        if self.stacks is not None:
            with self.lock:
                self.stacks.set_postfix_str(f"failed {n_failed}" if n_failed else "", refresh=False)
                self.stacks.update(1)

    def write(self, msg: str):
        if self.stacks is not None:
            self.stacks.write(msg, file=sys.stderr)
        else:
            print(msg, file=sys.stderr)

    def close(self):
        for bar in (self.tiles, self.stacks):
            if bar is not None:
                bar.close()


def _open(item: StackItem):
    ov = item.overrides
    return open_stack(item.source, ov.get("frame_interval_s"), ov.get("pixel_size_um"),
                      channel=ov.get("channel"), plane=ov.get("plane"))


def process_stack(item: StackItem, plan: BatchPlan, *, progress=None, cancel=None) -> str:
    """Open, convert if needed, analyse and save one stack; return ``"done"`` or ``"reused"``.

    Runs where it is called (on a worker, from :func:`stack_task`); the
    engine sends the tiles to the default client's workers. Raises whatever
    opening, converting, analysing or saving raised.
    """
    from .report import report_writers

    dest = plan.out / item.name
    original = _open(item)  # metadata only; checks the overrides early
    identity = original.identity()
    state = folder_state(dest, plan.parameters, identity)
    if state == "finished":
        return "reused"
    if state == "foreign":
        raise RhythmapError(
            f"{str(dest)!r} already exists and is not a result this runner made for this input; it was left "
            "untouched. Move it away, or choose another output folder with -o.")
    converted = None
    stack = original
    if _needs_conversion(item.source):
        # The TIFF/video-backed array stays in this process; the engine's tiles read the OME-Zarr copy.
        conv_dir = plan.out / CONVERTED_DIR
        converted = conv_dir / f"{item.name}-{_identity_hash(identity)}.ome.zarr"
        for old in conv_dir.glob(f"{glob.escape(item.name)}-*.ome.zarr"):
            if old != converted and re.fullmatch(re.escape(item.name) + r"-[0-9a-f]{10}\.ome\.zarr", old.name):
                shutil.rmtree(old, ignore_errors=True)  # a copy of an older version of this input
        overrides = {k: item.overrides[k] for k in OVERRIDES if item.overrides.get(k) is not None}
        convert_cached(item.source, str(converted), overrides)
        stack = open_stack(converted, original.frame_interval_s, original.pixel_size_um)
    result = analyze(stack, plan.rate_range_bpm, progress=progress, cancel=cancel, **plan.options)
    result.input["batch"] = {"runner": RUNNER_TAG, "name": item.name, "source": item.source,
                             "source_identity": identity, "overrides": item.overrides,
                             "analysed_copy": str(converted) if converted else None, "columns": item.columns}
    extra = report_writers(result, stack) if plan.report else None
    result.save(dest, overwrite=state in ("stale", "partial"), extra_files=extra)
    if converted is not None and not plan.keep_converted:
        shutil.rmtree(converted, ignore_errors=True)
    return "done"


def stack_task(item: StackItem, plan: BatchPlan, stop_event: str, topic: str) -> dict:
    """The dask task that drives one stack from a worker.

    It secedes from the worker's thread pool (``worker_client``) so the
    stack's own tile tasks can use every worker thread, including this one.
    Everything heavy - conversion, the engine's tiles and its per-region
    reference step, saving and the report - thus runs on the cluster, not in
    the runner. Progress goes to the runner as dask events on ``topic``; a
    set ``stop_event`` (a :class:`distributed.Event`) cancels at the next tile.
    If the worker dies, dask runs the task again elsewhere: every step is safe
    to repeat (conversion and saving write beside and rename). Returns
    ``{"status": "done" | "reused" | "failed", "error": message}``; an error of
    the stack is returned, not raised, so it is not logged as a task failure.
    """
    from distributed import Event, get_worker, worker_client

    worker = get_worker()
    attempt = uuid.uuid4().hex[:6]
    with worker_client() as client:
        stop = Event(stop_event, client=client)

        def cancel() -> bool:
            try:
                return stop.is_set()
            except Exception:  # noqa: BLE001 - scheduler gone: stop
                return True

        def progress(done, total, stage):
            worker.log_event(topic, {"name": item.name, "attempt": attempt, "stage": stage,
                                     "done": int(done), "total": int(total)})

        try:
            return {"status": process_stack(item, plan, progress=progress, cancel=cancel), "error": ""}
        except Exception as exc:  # noqa: BLE001 - a failing stack is a result of the batch, not a task error
            return {"status": "failed", "error": _describe(exc)}


def _describe(exc: BaseException) -> str:
    return f"{type(exc).__name__}: {str(exc) or repr(exc)}"


def clean_leftovers(out: Path) -> list[Path]:
    """Remove temporary folders a killed run left in the batch output folder (and only there)."""
    removed = []
    pattern = re.compile(r"^\..+\.(partial|old)-[0-9a-f]{8}$")
    for folder in (out, out / CONVERTED_DIR):
        if not folder.is_dir():
            continue
        for p in folder.iterdir():
            if pattern.match(p.name):
                if p.is_dir():
                    shutil.rmtree(p, ignore_errors=True)
                else:
                    p.unlink(missing_ok=True)
                removed.append(p)
    return removed


@contextlib.contextmanager
def output_lock(out: Path):
    """Hold ``OUT/.rhythmap-batch.lock`` so two runners never share an output folder."""
    out.mkdir(parents=True, exist_ok=True)
    lock = out / LOCK_FILE
    me = {"host": socket.gethostname(), "pid": os.getpid(), "started": time.time()}
    for _ in range(2):
        try:
            fd = os.open(lock, os.O_CREAT | os.O_EXCL | os.O_WRONLY)
        except FileExistsError:
            try:
                other = json.loads(lock.read_text())
            except (OSError, ValueError):
                other = {}
            if other.get("host") == me["host"] and not _pid_alive(other.get("pid")):
                lock.unlink(missing_ok=True)  # left by a runner that was killed
                continue
            raise UsageError(
                f"another batch runner is using {str(out)!r} (pid {other.get('pid')} on {other.get('host')}). "
                f"Wait for it to end; if it is dead, delete {str(lock)!r}.") from None
        with os.fdopen(fd, "w") as fh:
            json.dump(me, fh)
        break
    try:
        yield
    finally:
        lock.unlink(missing_ok=True)


def _pid_alive(pid) -> bool:
    try:
        os.kill(int(pid), 0)
    except (TypeError, ValueError, ProcessLookupError):
        return False
    except PermissionError:
        return True
    return True


def run_batch(plan: BatchPlan, conn: Connection, *, show_progress: bool = True) -> list[Outcome]:
    """Run every stack of ``plan`` on ``conn``'s cluster; return one :class:`Outcome` per stack.

    One :func:`stack_task` per stack; at most ``in_flight`` of them (default:
    the cluster's worker threads + 1) are submitted at once, since each
    secedes from its worker's pool and would otherwise all start together.
    Each goes to the worker driving the fewest stacks: a seceded task leaves
    its worker looking idle, so the scheduler alone would stack the drivers on
    one worker process, where their serial steps (persistence, propagation,
    saving) share one interpreter lock. The choice is a preference
    (``allow_other_workers``): if that worker is lost, dask runs the stack
    elsewhere; the scheduler's work stealing may also move a driver that is
    still queued behind tile tasks (slower, never wrong). Retries and moving work off a lost worker are dask's. A stack
    that fails is recorded and the batch goes on.
    """
    from distributed import Event, as_completed
    from distributed.diagnostics.plugin import WorkerPlugin

    class ImportFirst(WorkerPlugin):
        """Import zarr and the engine on each worker (now and as workers join) before any task
        arrives. A fresh worker otherwise imports zarr while unpickling its first task on the
        event-loop thread as a task thread imports it too; Python's import then fails with a
        partly initialised module, the worker's stream from the scheduler dies, and every
        stack runs on the other workers (seen in CI)."""

        name = "rhythmap-import-first"

        def setup(self, worker):
            import zarr  # noqa: F401

            import rhythmap.engine  # noqa: F401

    client = conn.client
    client.register_plugin(ImportFirst())
    in_flight = plan.in_flight or conn.expected_threads + 1
    run_id = uuid.uuid4().hex[:8]
    stop = Event(f"rhythmap-batch-stop-{run_id}", client=client)
    topic = f"rhythmap-batch-progress-{run_id}"
    bars = _Bars(len(plan.items), show_progress)
    client.subscribe_topic(topic, bars.on_event)
    outcomes: dict[int, Outcome] = {}
    started: dict[str, tuple[int, float]] = {}
    driving: dict[str, str] = {}  # stack task key -> the worker it was sent to

    def least_busy_worker() -> str | None:
        try:  # asked of the scheduler each time (the client's cached view may not list them yet)
            workers = list(client.nthreads())
        except Exception:  # noqa: BLE001 - no answer: let the scheduler choose
            return None
        if not workers:
            return None
        load = {w: 0 for w in workers}
        for w in driving.values():
            if w in load:
                load[w] += 1
        return min(workers, key=lambda w: load[w])

    def submit(i: int):
        item = plan.items[i]
        target = least_busy_worker()
        where = {"workers": [target], "allow_other_workers": True} if target else {}
        fut = client.submit(stack_task, item, plan, stop.name, topic, pure=False,
                            key=f"rhythmap-stack-{item.name}-{run_id}", **where)
        started[fut.key] = (i, time.perf_counter())
        if target:
            driving[fut.key] = target
        return fut

    queue = iter(range(len(plan.items)))
    futures = as_completed([submit(i) for _, i in zip(range(in_flight), queue)])
    try:
        for fut in futures:
            i, t0 = started.pop(fut.key)
            driving.pop(fut.key, None)
            item = plan.items[i]
            if fut.status == "finished":
                res = fut.result()
            else:  # e.g. KilledWorker: the task lost its worker more than allowed_failures times
                try:
                    exc = fut.exception()
                except (Exception, asyncio.CancelledError) as err:  # cancelled by someone else
                    exc = err
                res = {"status": "failed", "error": _describe(exc)}
            outcomes[i] = Outcome(item, res["status"], res["error"], time.perf_counter() - t0)
            if res["status"] == "failed":
                bars.write(f"failed: {item.name}: {res['error']}")
            fut.release()
            bars.stack_done(sum(o.status == "failed" for o in outcomes.values()))
            nxt = next(queue, None)
            if nxt is not None:
                futures.add(submit(nxt))
    except BaseException:
        with contextlib.suppress(Exception):
            stop.set()  # stack tasks already running stop at their next tile
        raise
    finally:
        bars.close()
        with contextlib.suppress(Exception):
            client.unsubscribe_topic(topic)
    return [outcomes[i] for i in range(len(plan.items))]


# ============================================================================ summary
def summary_table(plan: BatchPlan, outcomes: list[Outcome]) -> pd.DataFrame:
    """One row per stack and region (one per stack when there is no region table), read from the folders."""
    rows = []
    free = plan.free_columns
    for o in outcomes:
        dest = plan.out / o.item.name
        base = {"name": o.item.name, "status": o.status, "error": o.error, "source": o.item.source,
                "result_folder": o.item.name if o.status != "failed" else ""}
        base.update({c: o.item.columns.get(c, "") for c in free})
        regions = pd.DataFrame()
        if o.status != "failed":
            rec = json.loads((dest / RUN_FILE).read_text())
            shape = (rec.get("input") or {}).get("shape") or [None] + list(rec.get("shape", [None, None]))
            base.update({"frame_interval_s": rec.get("frame_interval_s"), "pixel_size_um": rec.get("pixel_size_um"),
                         "n_frames": shape[0], "height_px": shape[1], "width_px": shape[2]})
            base.update(rec.get("summary") or {})
            base["analysis_s"] = (rec.get("timings") or {}).get("total_s")
            base["rhythmap_version"] = rec.get("version", "")
            with contextlib.suppress(FileNotFoundError, pd.errors.EmptyDataError):
                regions = pd.read_csv(dest / REGIONS_FILE)
        if len(regions):
            for _, reg in regions.iterrows():
                rows.append({**base, **{(c if c.startswith("region") else f"region_{c}"): v
                                        for c, v in reg.items()}})
        else:
            rows.append(base)
    table = pd.DataFrame(rows)
    for col in ("n_frames", "height_px", "width_px", "n_regions"):
        if col in table.columns:
            table[col] = pd.to_numeric(table[col], errors="coerce").astype("Int64")
    return table


def failures_table(outcomes: list[Outcome]) -> pd.DataFrame:
    return pd.DataFrame([{"name": o.item.name, "source": o.item.source, "error": o.error}
                         for o in outcomes if o.status == "failed"], columns=["name", "source", "error"])


_WELL = re.compile(r"(?<![A-Za-z0-9])([A-Pa-p])0?(\d{1,2})(?![0-9])")


def parse_well(text) -> tuple[int, int] | None:
    """(row, column) from zero of a plate well written like ``B03``, ``b3`` or ``plate1_C12_t0``."""
    m = _WELL.search(str(text))
    if not m:
        return None
    row, col = ord(m.group(1).upper()) - ord("A"), int(m.group(2)) - 1
    return (row, col) if 0 <= col < 24 else None


def write_summary_figure(table: pd.DataFrame, path: Path) -> Path | None:
    """``summary.png``: rate by condition (or by stack), and a plate heat map when stacks are wells."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    if table.empty:
        return None
    per_stack = table.drop_duplicates("name").set_index("name")
    rate = pd.to_numeric(per_stack.get("rate_median_bpm", pd.Series(np.nan, per_stack.index)), errors="coerce")
    wells = None
    if "well" in per_stack.columns:
        wells = per_stack["well"].map(parse_well)
    elif len(per_stack) >= 2:
        wells = pd.Series(per_stack.index, index=per_stack.index).map(parse_well)
    if wells is not None and (wells.isna().any() or wells.nunique() < 2):
        wells = None
    fig = Figure(figsize=(13 if wells is not None else 7, 4.8), dpi=100)
    FigureCanvasAgg(fig)
    axes = fig.subplots(1, 2 if wells is not None else 1, squeeze=False)[0]
    ax = axes[0]
    if "condition" in per_stack.columns:
        groups = {c: rate[per_stack["condition"] == c].dropna().to_numpy()
                  for c in dict.fromkeys(per_stack["condition"])}
        labels = [str(c) for c in groups]
        for k, vals in enumerate(groups.values()):
            jitter = np.random.default_rng(k).uniform(-0.12, 0.12, vals.size)
            ax.plot(k + jitter, vals, "o", color="C0", alpha=0.8)
            if vals.size:
                ax.hlines(np.median(vals), k - 0.3, k + 0.3, color="k")
        ax.set_xticks(range(len(labels)), labels, rotation=30, ha="right")
        ax.set_xlabel("condition")
        ax.set_title("median rate per stack, by condition (bar: median)")
    else:
        ax.plot(range(len(rate)), rate.to_numpy(), "o")
        ax.set_xticks(range(len(rate)), [str(n) for n in rate.index], rotation=60, ha="right", fontsize=7)
        ax.set_title("median rate per stack")
    failed = per_stack["status"] == "failed"
    if failed.any():
        ax.text(0.01, 0.99, f"{int(failed.sum())} failed stack(s) not shown", transform=ax.transAxes,
                va="top", fontsize=8, color="C3")
    ax.set_ylabel("rate (bpm)")
    if wells is not None:
        rows, cols = zip(*wells)
        n_rows, n_cols = (8, 12) if max(rows) < 8 and max(cols) < 12 else (16, 24)
        grid = np.full((n_rows, n_cols), np.nan)
        for (r, c), val in pd.Series(rate.to_numpy(), index=list(wells)).groupby(level=0).mean().items():
            grid[r, c] = val
        ax = axes[1]
        ax.set_facecolor("0.9")
        im = ax.imshow(grid, cmap="viridis")
        fig.colorbar(im, ax=ax, label="median rate (bpm)")
        for (r, c), bad in zip(wells, failed):
            if bad:
                ax.plot(c, r, "x", color="C3", ms=10, mew=2)
        ax.set_xticks(range(n_cols), [str(c + 1) for c in range(n_cols)], fontsize=7)
        ax.set_yticks(range(n_rows), [chr(ord("A") + r) for r in range(n_rows)], fontsize=7)
        ax.set_title("plate layout (x: failed; blank: not imaged)")
    fig.suptitle(f"rhythmap {__version__} batch: {int((~failed).sum())} of {len(per_stack)} stacks analysed")
    fig.tight_layout()
    tmp = path.with_name(f".{path.name}.partial-{uuid.uuid4().hex[:8]}")
    fig.savefig(tmp, format="png")
    os.replace(tmp, path)
    return path


def write_outputs(plan: BatchPlan, outcomes: list[Outcome]) -> pd.DataFrame:
    """Write summary.csv, summary.png and failures.csv (removed when nothing failed), each atomically."""
    table = summary_table(plan, outcomes)
    _write_csv(table, plan.out / SUMMARY_CSV)
    fails = failures_table(outcomes)
    if len(fails):
        _write_csv(fails, plan.out / FAILURES_CSV)
    else:
        (plan.out / FAILURES_CSV).unlink(missing_ok=True)
    try:
        write_summary_figure(table, plan.out / SUMMARY_PNG)
    except Exception as exc:  # noqa: BLE001 - the figure must not cost the table
        print(f"rhythmap batch: could not draw {SUMMARY_PNG}: {exc}", file=sys.stderr)
    return table


def _write_csv(table: pd.DataFrame, path: Path) -> None:
    tmp = path.with_name(f".{path.name}.partial-{uuid.uuid4().hex[:8]}")
    table.to_csv(tmp, index=False)
    os.replace(tmp, path)


# ============================================================================ command line
def build_parser() -> argparse.ArgumentParser:
    from .cli import add_analysis_arguments

    p = argparse.ArgumentParser(
        prog="rhythmap batch",
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
    except RhythmapError as exc:
        print(f"rhythmap batch: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("rhythmap batch: interrupted. Finished stacks are kept; run the same command again to "
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
                print(f"rhythmap batch: {len(plan.items)} stack(s) -> {plan.out} on {conn.description}",
                      file=sys.stderr)
                if conn.dashboard:
                    print(f"rhythmap batch: dask dashboard at {conn.dashboard}", file=sys.stderr)
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
    print(f"rhythmap batch: {counts['done']} analysed, {counts['reused']} already finished, {counts['failed']} "
          f"failed in {time.perf_counter() - t0:.1f} s; summary in {plan.out / SUMMARY_CSV}"
          + (f", failures in {plan.out / FAILURES_CSV}" if counts["failed"] else ""))
    return 1 if counts["failed"] else 0


def _raise_interrupt(signum, frame):
    raise KeyboardInterrupt


if __name__ == "__main__":
    raise SystemExit(main())
