"""The package's house rules, read from its source: layers, imports, name, public API.

The import graph is read with :mod:`ast` (every ``import`` anywhere in a
module, including those inside functions, which are imports all the same);
nothing is imported to check it.
"""

from __future__ import annotations

import ast
import os
import re
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest

import tempofield

ROOT = Path(__file__).resolve().parents[1]
PKG = ROOT / "src" / "tempofield"

#: The faces: they use the layers below and nothing below uses them.
FACES = ("tempofield.cli", "tempofield.cliargs", "tempofield.batch", "tempofield.plugin")

#: Rank of each layer: a module may import modules of its own rank or lower only.
RANKS = {
    "tempofield.errors": 0, "tempofield._dtypes": 0, "tempofield._version": 0,
    "tempofield.io": 1,
    "tempofield.kernels": 2,
    "tempofield.scenes": 2,
    "tempofield.outputs": 3,
    "tempofield.engine": 4,
    **{face: 5 for face in FACES},
}

GUI_LIBS = ("napari", "qtpy", "PyQt5", "PyQt6", "PySide2", "PySide6", "superqt", "magicgui", "vispy")
DASK_LIBS = ("dask", "distributed", "dask_jobqueue")


def _module_name(path: Path) -> str:
    rel = path.relative_to(PKG.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _modules() -> dict[str, Path]:
    return {_module_name(p): p for p in sorted(PKG.rglob("*.py"))}


MODULES = _modules()


def _resolve(importer: str, node: ast.ImportFrom) -> str:
    if not node.level:
        return node.module or ""
    base = importer.split(".")
    is_pkg = MODULES[importer].name == "__init__.py"
    base = base[:len(base) - node.level + (1 if is_pkg else 0)]
    return ".".join(base + ([node.module] if node.module else []))


def _imports(name: str, source: str | None = None) -> set[str]:
    """Every module a module imports (third-party by top name; ours by full dotted name)."""
    tree = ast.parse(source if source is not None else MODULES[name].read_text(), filename=str(MODULES[name]))
    found: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            module = _resolve(name, node)
            found.add(module)
            for alias in node.names:  # "from pkg import module" imports the module
                sub = f"{module}.{alias.name}"
                if sub in MODULES:
                    found.add(sub)
                elif module == "tempofield" and alias.name in tempofield._PUBLIC:
                    found.add(tempofield._PUBLIC[alias.name])  # the lazily loaded public names
    return found


def _ours(names) -> set[str]:
    return {n for n in names if n == "tempofield" or n.startswith("tempofield.")}


def _rank(module: str) -> int:
    best = None
    for prefix, rank in RANKS.items():
        if module == prefix or module.startswith(prefix + "."):
            if best is None or len(prefix) > len(best[0]):
                best = (prefix, rank)
    return best[1] if best else 0  # the package's own __init__ loads lazily


def test_every_module_has_a_layer():
    loose = [m for m in MODULES if m != "tempofield" and not any(
        m == p or m.startswith(p + ".") for p in RANKS)]
    assert not loose, f"modules outside every layer (add them to a folder or to RANKS): {loose}"


def test_imports_point_down_only():
    wrong = []
    for name in MODULES:
        for target in _ours(_imports(name)):
            if target != "tempofield" and _rank(target) > _rank(name):
                wrong.append(f"{name} (layer {_rank(name)}) imports {target} (layer {_rank(target)})")
    assert not wrong, "\n".join(wrong)


def _face_imports_from_below(imports_of=_imports) -> list:
    return [(name, target) for name in MODULES if not name.startswith(FACES)
            for target in _ours(imports_of(name)) if target.startswith(FACES)]


def test_nothing_below_the_faces_imports_a_face():
    assert not _face_imports_from_below()


def test_napari_and_qt_only_in_the_plugin():
    wrong = [(name, lib) for name in MODULES if not name.startswith("tempofield.plugin")
             for lib in _imports(name) if lib.split(".")[0] in GUI_LIBS]
    assert not wrong


def test_dask_only_in_the_engine_and_the_batch_runner():
    allowed = ("tempofield.engine", "tempofield.batch")
    wrong = [(name, lib) for name in MODULES if not name.startswith(allowed)
             for lib in _imports(name) if lib.split(".")[0] in DASK_LIBS]
    assert not wrong


def test_no_import_circles():
    graph = {name: {t for t in _ours(_imports(name)) if t in MODULES and t != name} for name in MODULES}
    # Tarjan's strongly connected components; a component of more than one module is a circle.
    index, low, stack, on_stack, circles = {}, {}, [], set(), []
    counter = [0]

    def visit(v):
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on_stack.add(v)
        for w in graph[v]:
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                circles.append(sorted(comp))

    sys.setrecursionlimit(max(sys.getrecursionlimit(), 10_000))
    for v in graph:
        if v not in index:
            visit(v)
    assert not circles, f"import circles: {circles}"


def test_the_layering_check_catches_a_face_imported_from_below():
    """The check above can fail: a kernel that imports the CLI inside a function is reported."""
    bad = "tempofield.kernels.spectral"
    text = MODULES[bad].read_text() + "\n\ndef _bad():\n    from tempofield import cli\n"

    def imports_of(name):
        return _imports(name, text if name == bad else None)

    assert _face_imports_from_below(imports_of) == [(bad, "tempofield.cli")]


def test_every_loop_module_sits_beside_its_kernel():
    """Compiled loops live next to the kernel that uses them, not in one shared file."""
    loops = sorted(p.stem for p in (PKG / "kernels").glob("_*_loops.py"))
    assert loops, "no compiled loop modules found"
    for stem in loops:
        kernel = stem[1:-len("_loops")]
        assert (PKG / "kernels" / f"{kernel}.py").exists(), f"{stem}.py has no kernel module {kernel}.py"
        assert f"tempofield.kernels.{stem}" in _imports(f"tempofield.kernels.{kernel}")


# ------------------------------------------------------------------ the name
OLD = "rhyth" + "map"  # spelled in two parts so this file does not hold it


def _repository_files() -> list[Path]:
    try:
        out = subprocess.run(["git", "ls-files"], cwd=ROOT, capture_output=True, text=True, check=True).stdout
        files = [ROOT / line for line in out.splitlines() if line]
    except (OSError, subprocess.CalledProcessError):
        skip = {".git", ".venv", "__pycache__", "build", "dist"}
        files = [p for p in ROOT.rglob("*") if p.is_file() and not skip & set(p.relative_to(ROOT).parts)]
    return [p for p in files if p.is_file()]


def test_the_old_name_appears_nowhere_but_the_changelog():
    hits = []
    for path in _repository_files():
        rel = path.relative_to(ROOT).as_posix()
        if OLD in rel.lower():
            hits.append(f"file name {rel}")
        data = path.read_bytes()
        if OLD.encode() not in data.lower():
            continue
        if rel == "CHANGELOG.md":
            lines = [ln for ln in data.decode().splitlines() if OLD in ln.lower()]
            if len(lines) == 1:
                continue
        hits.append(rel)
    assert not hits, f"the old name is still in: {hits}"


def test_the_changelog_says_the_name_changed():
    lines = [ln for ln in (ROOT / "CHANGELOG.md").read_text().splitlines() if OLD in ln.lower()]
    assert len(lines) == 1 and "tempofield" in lines[0]


# ------------------------------------------------------------------ the public API
def test_every_name_the_readme_shows_exists():
    readme = (ROOT / "README.md").read_text()
    code = "\n".join(re.findall(r"```python\n(.*?)```", readme, re.S))
    names = set(re.findall(r"\btempofield\.(\w+)", code))
    assert {"open_stack", "analyze"} <= names
    for name in sorted(names):
        assert hasattr(tempofield, name), f"README shows tempofield.{name}, which does not exist"
    fields = set(re.findall(r"\bresult\.(\w+)", code)) - {"save"}
    from tempofield.outputs.result import RhythmResult
    for name in fields:
        assert name in RhythmResult.__dataclass_fields__, f"README shows result.{name}"


def test_the_public_entry_points_keep_their_names():
    from tempofield.engine import run

    for name in ("open_stack", "analyze", "iter_analyze", "load_result", "RhythmResult", "Stack",
                 "TempofieldError", "Progress"):
        assert getattr(tempofield, name) is not None
    assert tempofield.iter_analyze is run.iter_analyze
    with pytest.raises(AttributeError, match="no attribute"):
        tempofield.not_a_name  # noqa: B018


def test_importing_the_package_loads_no_numerical_stack():
    code = "import sys, tempofield; print(sorted(m for m in ('dask', 'numba', 'scipy', 'numpy') if m in sys.modules))"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[]"


# ------------------------------------------------------------------ the compiled loops' fallback
def test_noalias_compiler_is_used_with_the_pinned_numba():
    """Within the numba range pyproject.toml pins, the fast (noalias) loops are compiled."""
    from tempofield.kernels import _jit

    first, last = _jit.NOALIAS_TESTED_NUMBA
    pin = re.search(r'"numba>=([\d.]+),<([\d.]+)"', (ROOT / "pyproject.toml").read_text())
    assert pin, "pyproject.toml must pin numba to the range the noalias compiler is tested with"
    lo = tuple(int(v) for v in pin.group(1).split(".")[:2])
    hi = tuple(int(v) for v in pin.group(2).split(".")[:2])
    assert lo == first and hi == (last[0], last[1] + 1)
    assert _jit.NOALIAS_STATUS == "noalias"
    assert _jit.JIT_NOALIAS["pipeline_class"] is _jit.NOALIAS_COMPILER


_FALLBACK_SCRIPT = textwrap.dedent("""
    import sys
    import numpy as np
    from tempofield.kernels import _jit, preprocess, spectral

    rng = np.random.default_rng(3)
    t = np.arange(240)[:, None, None] * 0.04
    frames = (500 + 40 * np.sin(2 * np.pi * 1.3 * t + rng.uniform(0, 6, (1, 10, 12)))
              + rng.normal(0, 5, (240, 10, 12))).astype(np.float32)
    plan = spectral.plan_spectrum(240, 0.04, (30, 180))
    basis = preprocess.trend_basis(240, 0.04, 0.25 * 30 / 60)
    maps = spectral.spectral_maps(preprocess.box_pool(frames, 1).reshape(240, -1), plan, basis)
    spec = spectral.rfft_time(frames.reshape(240, -1))
    np.savez(sys.argv[1], status=_jit.NOALIAS_STATUS, spec=spec, **maps)
""")


def test_plain_jit_fallback_gives_the_same_numbers(tmp_path):
    """With the noalias class turned off (TEMPOFIELD_PLAIN_JIT=1) the loops compile with plain
    numba.jit (a fresh cache, so nothing compiled the other way is reused) and give the same maps."""
    script = tmp_path / "run.py"
    script.write_text(_FALLBACK_SCRIPT)
    outs = {}
    for mode, extra in (("noalias", {}), ("plain", {"TEMPOFIELD_PLAIN_JIT": "1"})):
        env = {**os.environ, **extra, "NUMBA_CACHE_DIR": str(tmp_path / f"cache-{mode}")}
        env.pop("TEMPOFIELD_PLAIN_JIT", None) if mode == "noalias" else None
        subprocess.run([sys.executable, str(script), str(tmp_path / f"{mode}.npz")], env=env, check=True,
                       timeout=600)
        outs[mode] = np.load(tmp_path / f"{mode}.npz")
    assert str(outs["noalias"]["status"]) == "noalias"
    assert str(outs["plain"]["status"]).startswith("plain jit: TEMPOFIELD_PLAIN_JIT")
    for key in outs["noalias"].files:
        if key == "status":
            continue
        np.testing.assert_allclose(outs["plain"][key], outs["noalias"][key], rtol=1e-6, atol=1e-6,
                                   equal_nan=True, err_msg=key)
