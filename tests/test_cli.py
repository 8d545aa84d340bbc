"""The tempofield command, run as a user would: real files, exit codes, no tracebacks."""

from __future__ import annotations

import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import tifffile

from tempofield import cli
from tempofield.scenes import samples

ROOT = Path(__file__).resolve().parents[1]


def run(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "tempofield.cli", *map(str, args)], capture_output=True, text=True,
                          cwd=cwd, timeout=300)


@pytest.fixture(scope="module")
def sample_tif(tmp_path_factory):
    return samples.write_samples(tmp_path_factory.mktemp("samples"))[0]


def test_analyze_writes_outputs_and_a_summary(tmp_path, sample_tif):
    out = tmp_path / "out"
    p = run("analyze", sample_tif, "-o", out, "--rate-range", "20", "150")
    assert p.returncode == 0, p.stderr
    assert "not a diagnostic device" in p.stdout
    # one rate line per region, never a rate pooled over regions
    assert "rate (median, IQR)" not in p.stdout
    per_region = dict(re.findall(r"region (\d+): rate ([\d.]+) bpm \(median", p.stdout))
    for name in ("maps.ome.zarr", "run.json", "report.png", "regions.csv", "beats.csv"):
        assert (out / name).exists(), name
    truth = np.load(sample_tif.parent / "well_sheet_truth.npz")
    import tempofield

    res = tempofield.load_result(out)
    assert sorted(int(k) for k in per_region) == res.region_table["region"].tolist()
    for _, row in res.region_table.iterrows():
        assert float(per_region[str(int(row["region"]))]) == pytest.approx(row["rate_median_bpm"], abs=0.006)
    sheet = truth["regions"] == 1
    assert np.nanmedian(np.abs(res.rate_bpm[sheet] - truth["rate_bpm"][sheet])) < 0.5
    # one line per rhythm reference: loop score, beats, mean rate and beat-to-beat variability
    lines = re.findall(r"reference (\d+): loop score ([\d.]+), (\d+) beats, mean rate ([\d.]+) bpm, "
                       r"beat-interval CV ([\d.]+), phase from the ([a-z ,-]+)\n", p.stdout)
    assert sorted(int(m[0]) for m in lines) == sorted(res.references)
    for label, score, beats, rate, cv, method in lines:
        assert method == res.references[int(label)].method
        ref = res.references[int(label)]
        assert float(score) == pytest.approx(ref.score, abs=0.006)
        assert int(beats) == len(ref.beat_times_s) > 0
        assert float(rate) == pytest.approx(ref.rate_mean_bpm, abs=0.006)
        assert float(cv) == pytest.approx(ref.interval_cv, abs=6e-4)
    assert float(lines[[int(m[0]) for m in lines].index(1)][3]) == pytest.approx(float(truth["rate_bpm"][sheet][0]),
                                                                                abs=0.5)


def test_options_from_the_shared_table(tmp_path, sample_tif):
    out = tmp_path / "o2"
    p = run("analyze", sample_tif, "-o", out, "--rate-range", "20", "150", "--pooling-radius-px", "0",
            "--false-alarm", "0.01", "--quiet")
    assert p.returncode == 0, p.stderr
    import tempofield

    params = tempofield.load_result(out).parameters
    assert params["pooling_radius_px"] == 0 and params["false_alarm"] == 0.01
    assert params["phase_source"].startswith("kept spectra")


def test_an_option_on_by_default_has_a_flag_to_turn_it_off(tmp_path, sample_tif):
    out = tmp_path / "o3"
    p = run("analyze", sample_tif, "-o", out, "--rate-range", "20", "150", "--no-phase-from-kept-spectra", "--quiet")
    assert p.returncode == 0, p.stderr
    import tempofield

    params = tempofield.load_result(out).parameters
    assert params["phase_from_kept_spectra"] is False
    assert params["phase_source"] == "second read (phase_from_kept_spectra is off)"
    assert "phase from a second read (phase_from_kept_spectra is off)" in p.stdout


@pytest.mark.parametrize("args, match", [
    (["analyze", "/no/such.tif", "-o", "OUT"], "no such stack"),
    (["analyze", "{sample}", "-o", "OUT", "--rate-range", "20", "900"], "Nyquist"),
    (["analyze", "{sample}", "-o", "OUT", "--pooling-radius-px", "abc"], "--pooling-radius-px abc is not an integer"),
    (["analyze", "{nometa}", "-o", "OUT"], "--frame-interval"),
    (["analyze", "{sample}", "-o", "{existing}"], "already exists"),
    (["analyze", "{sample}", "-o", "{existing}", "--overwrite"], "not a tempofield result folder"),
    (["analyze", "{sample}", "-o", "{sampledir}", "--overwrite"], "holds the input"),
    (["analyze", "{sample}", "-o", "/proc/no/such/place"], "Nothing was left half-written"),
])
def test_bad_input_exits_2_without_traceback(tmp_path, sample_tif, args, match):
    nometa = tmp_path / "nometa.tif"
    tifffile.imwrite(nometa, np.zeros((20, 8, 8), np.uint16))
    existing = tmp_path / "existing"
    existing.mkdir()
    (existing / "precious.txt").write_text("keep me")
    subs = {"sample": sample_tif, "nometa": nometa, "existing": existing, "sampledir": sample_tif.parent}
    args = [a.format(**subs).replace("OUT", str(tmp_path / "out")) for a in args]
    p = run(*args)
    assert p.returncode == 2
    assert "Traceback" not in p.stderr
    assert match in p.stderr
    assert not (tmp_path / "out").exists()
    assert (existing / "precious.txt").exists() and sample_tif.exists()


def _bad_file(kind, path):
    rng = np.random.default_rng(0)
    ij = {"imagej": True, "metadata": {"axes": "TYX", "finterval": 0.05}}
    if kind == "2-D image":
        tifffile.imwrite(path, np.zeros((32, 32), np.uint16))
    elif kind == "one frame":
        tifffile.imwrite(path, np.zeros((1, 32, 32), np.uint16), **ij)
    elif kind == "too few frames":
        tifffile.imwrite(path, rng.integers(0, 100, (5, 32, 32)).astype(np.uint16), **ij)
    elif kind == "NaN frame":
        a = rng.normal(100, 1, (100, 16, 16)).astype(np.float32)
        a[3, 2, 2] = np.nan
        tifffile.imwrite(path, a, **ij)
    elif kind == "constant":
        tifffile.imwrite(path, np.full((100, 16, 16), 7, np.uint16), **ij)
    elif kind == "truncated":
        tifffile.imwrite(path, rng.integers(0, 100, (100, 16, 16)).astype(np.uint16), **ij)
        path.write_bytes(path.read_bytes()[:20000])


@pytest.mark.parametrize("kind, match", [
    ("2-D image", "single image with no time axis"),
    ("one frame", "single image with no time axis"),
    ("too few frames", "at least 8 frames"),
    ("NaN frame", "NaN or infinite values (frames [3]"),
    ("constant", "the stack is constant"),
    ("truncated", "truncated or corrupt"),
])
def test_bad_stacks_exit_2_with_their_reason(tmp_path, kind, match):
    """The bad-input table of the command line: each stack is refused with exit code 2, a message
    that says what is wrong (and what to do), no traceback, and no output folder."""
    stack = tmp_path / "bad.tif"
    _bad_file(kind, stack)
    p = run("analyze", stack, "-o", tmp_path / "out", "--rate-range", "60", "180")
    assert p.returncode == 2, p.stderr
    assert "Traceback" not in p.stderr
    assert match in p.stderr, p.stderr
    assert not (tmp_path / "out").exists()


def test_demo_in_a_clean_folder(tmp_path):
    p = run("demo", "-o", tmp_path / "demo", cwd=tmp_path)
    assert p.returncode == 0, p.stderr
    assert "results written to" in p.stdout
    assert (tmp_path / "demo" / "report.png").exists()


def test_convert_then_analyze_gives_the_same_maps(tmp_path, sample_tif):
    z = tmp_path / "s.ome.zarr"
    assert cli.main(["convert", str(sample_tif), str(z)]) == 0
    import tempofield
    from tempofield.outputs.result import MAP_NAMES

    a = tempofield.open_stack(z)
    b = tempofield.open_stack(sample_tif)
    assert a.data.chunks[0] == (a.n_frames,)
    assert a.frame_interval_s == pytest.approx(b.frame_interval_s)
    assert a.pixel_size_um == pytest.approx(b.pixel_size_um, rel=1e-6)
    np.testing.assert_array_equal(a.data.compute(), b.data.compute())
    assert cli.main(["convert", str(sample_tif), str(z)]) == 2  # refuses to overwrite
    # The analysis of the converted store and of the original TIFF, both through the command.
    for src, out in ((z, "from_zarr"), (sample_tif, "from_tif")):
        p = run("analyze", src, "-o", tmp_path / out, "--rate-range", "20", "150", "--quiet")
        assert p.returncode == 0, p.stderr
    ra, rb = tempofield.load_result(tmp_path / "from_zarr"), tempofield.load_result(tmp_path / "from_tif")
    assert rb.regions.max() >= 1  # the sample beats, so the comparison covers real maps
    for name in MAP_NAMES:
        np.testing.assert_array_equal(getattr(ra, name), getattr(rb, name), err_msg=name)
    assert sorted(ra.references) == sorted(rb.references)
    for label in rb.references:
        np.testing.assert_array_equal(ra.references[label].beat_times_s, rb.references[label].beat_times_s)


# ------------------------------------------------------------------------------------------ ending on a signal
def _command():
    """The installed console script (what users run), or the module if there is none."""
    script = Path(sys.executable).parent / "tempofield"
    return [str(script)] if script.exists() else [sys.executable, "-m", "tempofield.cli"]


@pytest.fixture(scope="module")
def long_stack(tmp_path_factory):
    """600 x 256 x 256 float32 (157 MB): several seconds of analysis on two cores."""
    path = tmp_path_factory.mktemp("long") / "long.tif"
    t = np.arange(600)[:, None, None] * 0.02
    data = (100 + 10 * np.sin(2 * np.pi * 1.5 * t)
            + np.random.default_rng(0).normal(0, 1, (600, 256, 256))).astype(np.float32)
    tifffile.imwrite(path, data, imagej=True, metadata={"axes": "TYX", "finterval": 0.02})
    return path


def _start(long_stack, tmp_path):
    tmp = tmp_path / "tmpdir"
    tmp.mkdir()
    env = dict(os.environ, TMPDIR=str(tmp))
    proc = subprocess.Popen([*_command(), "analyze", str(long_stack), "-o", str(tmp_path / "out"), "--quiet"],
                            env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    return proc, tmp


def _ended_cleanly(proc, tmp, tmp_path, code):
    _, err = proc.communicate(timeout=120)  # a hang fails here
    assert proc.returncode == code, err
    assert "Traceback" not in err
    assert len(err.strip().splitlines()) == 1, err  # one line says what happened
    assert [p.name for p in tmp_path.iterdir() if p.name != "tmpdir"] == []  # no result, no partial folder
    assert [p.name for p in tmp.rglob("*") if "tempofield" in p.name] == []  # the kept spectra are gone
    return err


@pytest.mark.parametrize("sig, code, says", [(signal.SIGTERM, 143, "SIGTERM"), (signal.SIGHUP, 129, "SIGHUP"),
                                             (signal.SIGINT, 130, "interrupted")])
def test_a_signal_during_the_analysis_ends_it_cleanly(long_stack, tmp_path, sig, code, says):
    """SIGTERM (kill, a job scheduler), SIGHUP (a closed terminal) and Ctrl-C while the maps pass writes
    its temporary spectra: the run ends with 128 + the signal's number and leaves nothing behind."""
    proc, tmp = _start(long_stack, tmp_path)
    deadline = time.monotonic() + 60
    while not any(p.name.startswith("tempofield-spectra-") for p in tmp.iterdir()):
        assert proc.poll() is None, proc.communicate()
        assert time.monotonic() < deadline, "the temporary spectra folder never appeared"
        time.sleep(0.02)
    proc.send_signal(sig)
    assert says in _ended_cleanly(proc, tmp, tmp_path, code)


@pytest.mark.skipif(not Path("/proc/self/maps").exists(), reason="needs /proc to see what the program has loaded")
def test_ctrl_c_while_the_program_imports_ends_quietly(long_stack, tmp_path):
    """Ctrl-C while numpy, dask and numba load (inside main, before the analysis starts)."""
    proc, tmp = _start(long_stack, tmp_path)
    maps = Path(f"/proc/{proc.pid}/maps")
    deadline = time.monotonic() + 60
    while "numpy" not in maps.read_text():  # the numerical modules have begun to load
        assert proc.poll() is None, proc.communicate()
        assert time.monotonic() < deadline
        time.sleep(0.005)
    proc.send_signal(signal.SIGINT)
    assert "interrupted" in _ended_cleanly(proc, tmp, tmp_path, 130)
