"""Folders that appear complete or not at all.

Everything tempofield writes as a folder (a result, a converted stack) is built
in a hidden sibling and renamed into place when complete; an existing folder
is replaced only when the caller asked for it, and only after the new one is
whole.
"""

from __future__ import annotations

import os
import shutil
import uuid
from contextlib import contextmanager
from pathlib import Path


def check_replaceable(dest, is_ours, what: str, protect=()) -> Path:
    """Refuse to replace ``dest`` unless it is one of our own outputs (``is_ours(dest)``) or empty.

    ``protect`` lists paths (inputs: files, folders, or glob patterns of frame
    files) that ``dest`` may neither hold nor lie inside. A ``dest`` below an
    existing file is refused too (no folder can be made there). Returns the
    resolved destination.

    Raises
    ------
    ResultExistsError
        When replacing ``dest`` would delete something that is not ours.
    InputError
        When ``dest`` lies inside an input, or below a file.
    """
    from tempofield.errors import InputError, ResultExistsError

    dest = Path(dest).resolve()
    for p in protect:
        p = _fixed_part(Path(p)).resolve()
        if p == dest or dest in p.parents:
            raise ResultExistsError(f"the output folder {str(dest)!r} holds the input {str(p)!r}; choose an output "
                                    "folder outside the data.")
        if p in dest.parents:
            raise InputError(
                f"the output folder {str(dest)!r} lies inside the input {str(p)!r}; tempofield never writes into "
                f"its input, and nothing was written. Choose an output folder outside it, e.g. "
                f"{str(p.parent / (p.name.split('.')[0] + '-results'))!r}.")
    blocker = next((a for a in dest.parents if a.exists() and not a.is_dir()), None)
    if blocker is not None:
        raise InputError(
            f"cannot make the output folder {str(dest)!r}: {str(blocker)!r} is a file, not a folder, so no folder "
            "can be made inside it. Choose an output folder elsewhere, e.g. "
            f"{str(blocker.parent / (blocker.name.split('.')[0] + '-results'))!r}.")
    if dest.exists() and not dest.is_dir():
        raise ResultExistsError(
            f"{str(dest)!r} is a file, not a folder; it was left untouched. Choose another output folder.")
    if dest.exists() and not (not any(dest.iterdir()) or is_ours(dest)):
        raise ResultExistsError(
            f"{str(dest)!r} exists and is not a {what}; it was left untouched. overwrite=True only replaces "
            f"an earlier {what}: choose another output folder.")
    return dest


def _fixed_part(path: Path) -> Path:
    """A path up to its first component with glob characters (``frames/*.tif`` -> ``frames``)."""
    parts = path.parts
    for i, part in enumerate(parts):
        if any(c in part for c in "*?["):
            return Path(*parts[:i]) if i else Path(".")
    return path


@contextmanager
def atomic_folder(dest, *, overwrite: bool = False, create: bool = True):
    """Yield a temporary path beside ``dest``; rename it to ``dest`` when the block ends without error.

    ``create=False`` yields a path that does not exist yet (for writers that
    create it themselves). On error the temporary folder is removed and
    ``dest`` is left as it was. The caller checks ``overwrite`` policy first;
    here an existing ``dest`` is replaced only with ``overwrite=True``.
    """
    dest = Path(dest).resolve()
    dest.parent.mkdir(parents=True, exist_ok=True)
    tmp = dest.parent / f".{dest.name}.partial-{uuid.uuid4().hex[:8]}"
    try:
        if create:
            tmp.mkdir()
        yield tmp
        if dest.exists():
            if not overwrite:
                raise FileExistsError(f"{dest} appeared while it was being written")
            trash = dest.parent / f".{dest.name}.old-{uuid.uuid4().hex[:8]}"
            os.replace(dest, trash)
            os.replace(tmp, dest)
            shutil.rmtree(trash, ignore_errors=True)
        else:
            os.replace(tmp, dest)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
