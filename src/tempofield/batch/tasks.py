"""Running a batch: one task per stack on the cluster's workers, progress, stop,
the output folder's lock, and the outcome of each stack.
"""

from __future__ import annotations

import asyncio
import contextlib
import glob
import json
import os
import re
import shutil
import socket
import sys
import threading
import time
import uuid
from dataclasses import dataclass
from pathlib import Path

from tempofield import analyze, open_stack
from tempofield.batch.cluster import Connection
from tempofield.batch.config import (
    CONVERTED_DIR,
    LOCK_FILE,
    OVERRIDES,
    RUNNER_TAG,
    BatchPlan,
    StackItem,
    UsageError,
)
from tempofield.batch.resume import (
    _identity_hash,
    _needs_conversion,
    convert_cached,
    folder_state,
)
from tempofield.errors import TempofieldError


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
    from tempofield.outputs.report import report_writers

    dest = plan.out / item.name
    original = _open(item)  # metadata only; checks the overrides early
    identity = original.identity()
    state = folder_state(dest, plan.parameters, identity)
    if state == "finished":
        return "reused"
    if state == "foreign":
        raise TempofieldError(
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
    """Hold ``OUT/.tempofield-batch.lock`` so two runners never share an output folder."""
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

        name = "tempofield-import-first"

        def setup(self, worker):
            import zarr  # noqa: F401

            import tempofield.engine.run  # noqa: F401

    client = conn.client
    client.register_plugin(ImportFirst())
    in_flight = plan.in_flight or conn.expected_threads + 1
    run_id = uuid.uuid4().hex[:8]
    stop = Event(f"tempofield-batch-stop-{run_id}", client=client)
    topic = f"tempofield-batch-progress-{run_id}"
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
                            key=f"tempofield-stack-{item.name}-{run_id}", **where)
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
