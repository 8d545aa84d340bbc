"""Writer: maps layers from the viewer saved as a tempofield result folder.

The result is rebuilt from the layers (see :func:`._layers.result_from_layers`)
and written by :meth:`tempofield.RhythmResult.save`, which writes beside the
destination and renames into place, and never replaces an existing folder.
The folder gets the same ``report.png`` as one written by ``tempofield analyze``
(drawn from the maps and references; without the raw stack, its traces panel
is left out).
"""

from __future__ import annotations

from pathlib import Path

from tempofield.errors import ResultExistsError
from tempofield.outputs.report import report_writers

from ._layers import result_from_layers


def write_result(path: str, layer_data: list[tuple]) -> list[str]:
    """Save the tempofield map layers among ``layer_data`` as a result folder at ``path``.

    Raises
    ------
    ResultExistsError
        If ``path`` exists (nothing is written).
    ValueError
        If none of the layers is a tempofield map.
    """
    dest = Path(path)
    if dest.exists():
        raise ResultExistsError(f"{str(dest)!r} already exists; nothing was written. "
                                "Choose a new folder name for the result.")
    result = result_from_layers(layer_data)
    return [str(result.save(dest, extra_files=report_writers(result)))]
