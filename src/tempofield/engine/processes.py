"""Work that holds Python's GIL (ripser) runs in worker processes: a reusable
spawned pool on one machine, or the workers of an active dask.distributed client.
"""

from __future__ import annotations

import importlib
import os
import sys
import threading
import warnings

from tempofield.engine.tiles import active_client


def preload_later_stages() -> None:
    """Import the libraries of the stages after the maps pass in a background thread.

    ripser (which imports scikit-learn and scipy.stats) takes about a second to
    import, and the references stage used to wait for it after the pass. The
    tile threads release the GIL for most of their work, so the import runs
    beside them; on two busy cores it mostly moves into the pass (measured
    about even, DEVELOPERS.md). A failed import is left for the stage itself
    to report.
    """
    def load():
        for name in ("ripser", "skimage.restoration"):
            try:
                importlib.import_module(name)
            except Exception:  # noqa: BLE001 - reported where it is used
                pass

    if "ripser" not in sys.modules:
        threading.Thread(target=load, name="tempofield-preload", daemon=True).start()


_POOL = None


def process_pool(n_workers: int):
    """A reusable pool of worker processes for ripser, which holds the GIL.

    See "Worker processes" in DEVELOPERS.md. Spawned, not forked (the caller
    may be a Qt application with threads), and created once per process on
    first use. None where a process may not have children (a daemonic worker),
    in which case work runs in this thread.
    """
    global _POOL
    import multiprocessing

    if n_workers < 1 or multiprocessing.current_process().daemon:
        return None
    if not main_is_guarded():
        warnings.warn("the running script has no `if __name__ == \"__main__\":` guard, so worker processes "
                      "would run it again; the references run in this thread instead.", RuntimeWarning,
                      stacklevel=3)
        return None
    if _POOL is None or _POOL[1] != n_workers:
        import atexit
        from concurrent.futures import ProcessPoolExecutor

        if _POOL is not None:
            _POOL[0].shutdown(wait=False, cancel_futures=True)
        pool = ProcessPoolExecutor(max_workers=n_workers, mp_context=multiprocessing.get_context("spawn"),
                                   initializer=watch_parent, initargs=(os.getpid(),))
        atexit.register(pool.shutdown, wait=False, cancel_futures=True)
        _POOL = (pool, n_workers)
    return _POOL[0]


#: How often a worker process checks that the program that started it is still alive, seconds.
PARENT_POLL_S = 0.5


def watch_parent(parent_pid: int) -> None:
    """Worker initializer: end this worker when its parent is gone.

    A worker blocks on its task queue, whose pipe every sibling also holds
    open, so a parent that crashed or was killed (no time to shut the pool
    down) left its workers waiting for ever: a few hundred MB each, orphaned.
    A daemon thread checks the parent's pid (on POSIX an orphan is re-parented,
    so ``os.getppid`` changes) and exits the worker at once.
    """
    def watch():
        import time

        while True:
            time.sleep(PARENT_POLL_S)
            if os.getppid() != parent_pid:
                os._exit(0)

    threading.Thread(target=watch, name="tempofield-parent-watch", daemon=True).start()


def main_is_guarded() -> bool:
    """False when the program's main script has no ``__main__`` guard: a spawned worker would run it again.

    Spawned processes import the parent's main script to rebuild its state;
    a script written like napari's examples (a viewer made at module level)
    would open a second viewer there and never return. Interactive sessions,
    notebooks, ``python -c`` and installed commands have no script to re-run
    (or one that is guarded), so they count as guarded.
    """
    main = sys.modules.get("__main__")
    path = getattr(main, "__file__", None)
    if not path or getattr(main, "__spec__", None) is not None:  # no script, or run with -m (a module)
        return True
    try:
        with open(path, encoding="utf-8", errors="ignore") as f:
            return "__main__" in f.read()
    except OSError:
        return True


def run_in_processes(jobs: dict, n_processes: int):
    """Run ``{key: (fn, args, kwargs)}``; yield (key, result or exception) as they end.

    On a dask.distributed cluster the jobs go to its workers; otherwise to a
    local pool of ``n_processes`` spawned processes, or to this thread when
    ``n_processes`` is 0 or processes cannot be started (a daemonic process, a
    script without a ``__main__`` guard: the remaining jobs then run here).
    """
    if not jobs:
        return
    client = active_client()
    if client is not None:
        from distributed import as_completed

        futures = {client.submit(fn, *args, pure=False, **kwargs): key for key, (fn, args, kwargs) in jobs.items()}
        for fut in as_completed(list(futures)):
            try:
                yield futures[fut], fut.result()
            except Exception as exc:  # returned to the caller, which decides
                yield futures[fut], exc
        return
    pool = process_pool(n_processes)
    pending = dict(jobs)
    if pool is not None:
        from concurrent.futures import as_completed as cf_completed
        from concurrent.futures.process import BrokenProcessPool

        futures = {pool.submit(fn, *args, **kwargs): key for key, (fn, args, kwargs) in jobs.items()}
        try:
            for fut in cf_completed(futures):
                try:
                    result = fut.result()
                except BrokenProcessPool:
                    reset_pool()
                    warnings.warn("worker processes could not start (is the script missing an "
                                  "`if __name__ == \"__main__\":` guard?); running in this thread instead.",
                                  RuntimeWarning, stacklevel=2)
                    break
                except Exception as exc:
                    result = exc
                yield futures[fut], result
                pending.pop(futures[fut])
            else:
                return
        finally:
            for fut in futures:
                fut.cancel()
    for key, (fn, args, kwargs) in pending.items():
        try:
            yield key, fn(*args, **kwargs)
        except Exception as exc:
            yield key, exc


def reset_pool():
    global _POOL
    if _POOL is not None:
        _POOL[0].shutdown(wait=False, cancel_futures=True)
    _POOL = None
