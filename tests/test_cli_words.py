"""Messages in the user's words: the command line names its flags, Python names its arguments;
range checks state both limits; help texts say what an option changes for the user."""

from __future__ import annotations

import doctest
import re
import subprocess
import sys

import numpy as np
import pytest
import tifffile
import zarr

from tempofield import cli
from tempofield.engine import presets
from tempofield.engine.options import OPTIONS, validate_options, validate_rate_range
from tempofield.errors import InputError


def run(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "tempofield.cli", *map(str, args)], capture_output=True, text=True,
                           cwd=cwd, timeout=300)


# ------------------------------------------------------------------------------------------ the translation
@pytest.mark.parametrize("python, command_line", [
    ("memory_budget_mb='1e9' is out of range", "--memory-budget-mb 1e9 is out of range"),
    ("rate_range_bpm=[20.0, 900.0] must satisfy", "--rate-range 20 900 must satisfy"),
    ("rate_range_bpm upper limit 900 bpm", "--rate-range upper limit 900 bpm"),
    ("e.g. frame_interval_s=0.02 for 50 frames per second.", "e.g. --frame-interval 0.02 for 50 frames per second."),
    ("choose one with channel=N, counted from 0", "choose one with --channel N, counted from 0"),
    ("the first channel is 0; the plane axis", "the first channel is 0; the plane axis"),  # plain words stay
    ("phase_from_kept_spectra=False", "--no-phase-from-kept-spectra"),
    ("overwrite=True only replaces", "--overwrite only replaces"),
    ("specimen='frog' is not known", "--specimen frog is not known"),
    ("'/data/frame_interval_s/a.tif' is missing", "'/data/frame_interval_s/a.tif' is missing"),  # paths stay
])
def test_python_names_become_flags(python, command_line):
    assert cli.in_command_line_words(python) == command_line


def test_the_examples_of_the_translation_run():
    finder, runner = doctest.DocTestFinder(), doctest.DocTestRunner()
    for test in finder.find(cli.in_command_line_words, "in_command_line_words", globs={"in_command_line_words":
                                                                                         cli.in_command_line_words}):
        runner.run(test)
    assert runner.failures == 0 and runner.tries >= 2


def test_every_flag_of_the_table_exists_on_the_command_line():
    parser = cli.build_parser()
    analyze = parser._subparsers._group_actions[0].choices["analyze"]
    known = {s for action in analyze._actions for s in action.option_strings}
    flags = cli.command_line_flags()
    assert {o.name for o in OPTIONS if o.cli} <= set(flags)
    assert set(flags.values()) <= known


# ------------------------------------------------------------------------------------------ Python's words
def test_python_errors_name_python_arguments():
    with pytest.raises(InputError) as err:
        validate_options({"memory_budget_mb": 1e9})
    assert "memory_budget_mb=1000000000.0 is out of range" in str(err.value) and "--" not in str(err.value)
    with pytest.raises(InputError, match=r"rate_range_bpm=\(150, 20\) must satisfy 0 < low < high.*"
                                         r"rate_range_bpm=\(30, 180\)") as err:
        validate_rate_range((150, 20))
    assert "--" not in str(err.value)


@pytest.mark.parametrize("opt", [o for o in OPTIONS if o.check is not None and o.kind in (int, float)],
                         ids=lambda o: o.name)
def test_every_range_check_states_both_limits(opt):
    numbers = re.findall(r"\d+(?:\.\d+)?", opt.allowed)
    assert len(numbers) >= 2 or "no upper limit" in opt.allowed, opt.allowed
    for value in (1e12, -1e12):
        try:
            validate_options({opt.name: value})
        except InputError as exc:
            assert opt.allowed in str(exc)
        else:
            assert value > 0 and "no upper limit" in opt.allowed


def test_an_unknown_specimen_lists_the_presets():
    with pytest.raises(InputError) as err:
        validate_options({"specimen": "frog"})
    assert all(name in str(err.value) for name in presets.SPECIMENS)


# ------------------------------------------------------------------------------------------ help texts
ADVANCED = ("gram_max_pixels", "n_landmarks", "max_frames_topology", "phase_from_kept_spectra", "worker_processes")


@pytest.mark.parametrize("name", ADVANCED)
def test_advanced_options_say_what_they_change(name):
    text = next(o for o in OPTIONS if o.name == name).help
    for jargon in ("GIL", "__main__", "Gram", "homology", "landmark", "persistence"):
        assert jargon not in text, (name, jargon)
    assert re.search(r"memory|faster|slower|takes longer|responding", text), name  # what it costs or gains
    when = r"lower it|raise it|try|turn it off|In the napari viewer"
    assert re.search(when, text, re.IGNORECASE), name  # and when to change it


def test_channel_and_plane_help_count_from_zero():
    p = run("analyze", "--help")
    text = " ".join(p.stdout.split())
    assert "counted from 0: the first channel is 0" in text and "counted from 0: the first plane is 0" in text
    c = " ".join(run("convert", "--help").stdout.split())
    assert "the first channel is 0" in c and "the first plane is 0" in c


def test_preset_warnings_do_not_show_notes_for_maintainers():
    import pandas as pd

    for spec in presets.SPECIMENS.values():
        assert "memory" not in spec.source + spec.conduction_source, spec.name
        table = pd.DataFrame({"region": [1], "rate_median_bpm": [1e5], "conduction_velocity_um_s": [1e9]})
        warnings = presets.plausibility_warnings(spec, table, 1.0)
        assert warnings and not any("memory" in w for w in warnings)
    from pathlib import Path

    assert "from memory" in Path(presets.__file__).read_text()  # the notes stay in the code, for maintainers


# ------------------------------------------------------------------------------------------ the command line
@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("words")
    rng = np.random.default_rng(3)
    tifffile.imwrite(d / "s.tif", rng.integers(0, 100, (64, 16, 16)).astype(np.uint16), imagej=True,
                     metadata={"axes": "TYX", "finterval": 0.05})
    tifffile.imwrite(d / "c.tif", rng.integers(0, 100, (40, 2, 8, 8)).astype(np.uint16), imagej=True,
                     metadata={"axes": "TCYX", "finterval": 0.05})
    (d / "copy.tif").write_bytes((d / "s.tif").read_bytes())
    (d / "frames").mkdir()
    for i, frame in enumerate(rng.integers(0, 100, (40, 16, 16)).astype(np.uint16)):
        tifffile.imwrite(d / "frames" / f"f{i}.tif", frame)
    z = zarr.create_array(str(d / "data" / "stack.zarr"), shape=(40, 16, 16), chunks=(40, 16, 16), dtype=np.uint16)
    z[:] = rng.integers(0, 100, (40, 16, 16)).astype(np.uint16)
    z.attrs["frame_interval_s"] = 0.05
    return d


@pytest.mark.parametrize("args, says, never", [
    (["s.tif", "-o", "out", "--memory-budget-mb", "1e9"],
     ["--memory-budget-mb 1e9 is out of range", "from 16 to 1000000"], ["memory_budget_mb"]),
    (["s.tif", "-o", "out", "--rate-range", "20", "900"], ["--rate-range upper limit 900 bpm"], ["rate_range_bpm"]),
    (["s.tif", "-o", "out", "--rate-range", "150", "20"],
     ["--rate-range 150 20 must satisfy 0 < low < high", "e.g. --rate-range 30 180"], ["rate_range_bpm"]),
    (["s.tif", "-o", "out", "--frame-interval", "1e-9"],
     ["--frame-interval 1e-09 looks wrong", "1e+09 frames per second", "typical values are 0.001 to 0.1 s",
      "e.g. --frame-interval 0.02"], ["bpm", "frame_interval_s"]),
    (["s.tif", "-o", "out", "--specimen", "frog"], ["--specimen frog is not known", *presets.SPECIMENS], []),
    (["s.tif", "-o", "copy.tif/res"], ["copy.tif' is a file, not a folder"], ["File exists"]),
    (["c.tif", "-o", "out", "--channel", "2"],
     ["--channel 2 is out of range", "counted from 0", "the first channel is 0"], ["channel=2"]),
    (["frames", "-o", "out"], ["single-frame TIFF files", "--frame-interval 0.02"], ["frame_interval_s"]),
    (["data/stack.zarr", "-o", "data/stack.zarr/results"], ["lies inside the input", "nothing was written"], []),
    (["frames", "-o", "frames/results", "--frame-interval", "0.05"], ["lies inside the input"], []),
    (["frames/*.tif", "-o", "frames/results", "--frame-interval", "0.05"], ["lies inside the input"], []),
])
def test_command_line_errors_name_the_flags(files, args, says, never):
    before = sorted(p.relative_to(files) for p in files.rglob("*"))
    p = run("analyze", *args, "--quiet", cwd=files)
    assert p.returncode == 2, p.stderr
    assert "Traceback" not in p.stderr
    text = " ".join(p.stderr.split())
    for words in says:
        assert words in text, (words, text)
    for words in never:
        assert words not in text, (words, text)
    assert sorted(p.relative_to(files) for p in files.rglob("*")) == before  # nothing written


def test_a_folder_of_frames_is_analysed_from_the_command_line(tmp_path):
    t = np.arange(120)[:, None, None] * 0.05
    frames = (100 + 20 * np.sin(2 * np.pi * 1.2 * t) * np.ones((1, 16, 16))
              + np.random.default_rng(0).normal(0, 1, (120, 16, 16))).astype(np.float32)
    for i, frame in enumerate(frames):
        tifffile.imwrite(tmp_path / f"frame{i}.tif", frame)
    p = run("analyze", tmp_path, "-o", tmp_path.parent / f"{tmp_path.name}-res", "--frame-interval", "0.05",
            "--rate-range", "30", "180", "--maps-only", "--quiet")
    assert p.returncode == 0, p.stderr
    import tempofield

    res = tempofield.load_result(tmp_path.parent / f"{tmp_path.name}-res")
    assert np.nanmedian(res.rate_bpm) == pytest.approx(72.0, abs=1.0)
