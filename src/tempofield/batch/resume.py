"""Resuming: whether a result folder is complete and current for its stack and
parameters, and the cached OME-Zarr copy of a stack that must be converted first.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np

from tempofield.batch.config import RESULT_ENTRIES, RUNNER_TAG
from tempofield.outputs.result import RUN_FILE, is_complete


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
    from tempofield.engine.convert import convert_stack

    if not Path(dest).exists():
        try:
            convert_stack(source, dest, **overrides)
        except FileExistsError:
            pass  # another attempt of this same task finished first
    return dest
