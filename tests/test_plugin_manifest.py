"""Packaging of the napari plugin: the npe2 manifest validates, and the engine needs no napari.

Sources: npe2's own validator (``npe2 validate`` and ``PluginManifest``), and a
subprocess in which a meta-path finder refuses napari, qtpy, PyQt5, magicgui
and npe2, as if they were not installed.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
import textwrap
from pathlib import Path

import tempofield

MANIFEST = Path(tempofield.__file__).parent / "plugin" / "napari.yaml"


def test_manifest_is_valid_and_its_commands_import():
    import npe2
    pm = npe2.PluginManifest.from_file(MANIFEST)
    assert pm.name == "tempofield"
    pm.validate_imports()  # every python_name resolves to a callable
    installed = npe2.PluginManifest.from_distribution("tempofield")  # through the napari.manifest entry point
    assert installed.name == "tempofield"
    assert {w.display_name for w in pm.contributions.widgets} == {"Rhythm analysis", "Region inspector"}
    assert {s.key for s in pm.contributions.sample_data} == {"well_sheet", "plane_wave", "noise"}
    assert len(pm.contributions.readers) == 2 and len(pm.contributions.writers) == 1


def test_npe2_validate_command():
    exe = shutil.which("npe2", path=str(Path(sys.executable).parent)) or shutil.which("npe2")
    assert exe is not None, "the npe2 command comes with the [napari] extra; install it"
    out = subprocess.run([exe, "validate", "tempofield"], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stdout + out.stderr
    assert "valid" in out.stdout


def test_engine_imports_and_runs_without_napari_or_qt():
    code = textwrap.dedent("""
        import importlib.abc, sys
        BLOCKED = ("napari", "qtpy", "PyQt5", "PyQt6", "PySide2", "PySide6", "magicgui", "npe2", "superqt", "vispy")
        class Blocker(importlib.abc.MetaPathFinder):
            def find_spec(self, name, path=None, target=None):
                if name.split(".")[0] in BLOCKED:
                    raise ImportError(f"{name} is blocked in this test")
                return None
        sys.meta_path.insert(0, Blocker())
        import numpy as np
        import tempofield, tempofield.engine.run, tempofield.outputs.result, tempofield.engine.stack, tempofield.cli
        t = np.arange(200)[:, None, None] * 0.05
        frames = 100 + 10 * np.sin(2 * np.pi * 1.5 * t) * np.ones((1, 8, 8))
        res = tempofield.analyze(tempofield.open_stack(frames, frame_interval_s=0.05), (40, 200))
        print(round(float(np.nanmedian(res.rate_bpm)), 1))
        leaked = sorted(m for m in sys.modules if m.split(".")[0] in BLOCKED)
        assert not leaked, leaked
    """)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip().splitlines()[-1] == "90.0"
