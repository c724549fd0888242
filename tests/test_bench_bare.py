"""The bare-C reference loops (livedyn/bench/bare.py, livedyn/bench/bare/) and their sections of
``bench kernels``: the loops agree with the numba kernels of the same precision, a deliberate
difference is caught as MISMATCH (and makes the command exit 1), the tables have their columns
and ``--algorithm`` reports every precision. No wall-clock assertions: timings are only checked
to exist and to be consistent with each other (ratios of the same medians, the instance count
formula).

Every case runs in both precisions (the float32 kernels of livedyn.dsp.precision). Every test
that needs the bare loops is skipped, with the build helper's one-line note, on a machine
without a C compiler.
"""
from __future__ import annotations

import math
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import livedyn.bench.bare as bare
import livedyn.bench.ctwin as ct
from livedyn.bench.kernels import noise_bursts
from livedyn.params import P_ATTACK, P_KNEE, P_RELEASE, P_THRESHOLD

ROOT = Path(__file__).resolve().parent.parent
FS = 48000
CASES = {c.name: c for c in bare.BARE_CASES}


@pytest.fixture(scope="module")
def lib():
    try:
        return bare.load()
    except ct.CTwinUnavailable as exc:
        pytest.skip(str(exc))


PRECISIONS = pytest.mark.parametrize("precision", bare.PRECISIONS)


# ---- agreement ------------------------------------------------------------------------------

@PRECISIONS
@pytest.mark.parametrize("name", list(CASES))
@pytest.mark.parametrize("blocksize", [64, 37])
def test_bare_loop_agrees_with_the_kernel(lib, name, precision, blocksize):
    got = bare.check_bare(lib, CASES[name], precision, FS, blocksize, seconds=0.5)
    assert got["check"] == "ok", got["mismatch"]
    assert got["max_abs_diff"] <= bare.TOLERANCE[precision]
    assert got["check_frames"] == (int(0.5 * FS) // blocksize) * blocksize
    if precision == "float64":
        # same double operations in the same order: nothing to round differently
        assert got["bit_identical"], got["max_abs_diff"]


@PRECISIONS
def test_ducker_loop_agrees_with_a_mono_key(lib, precision):
    case = bare.BareCase("ducker mono key", "ducker", "ducker", {}, 1)
    got = bare.check_bare(lib, case, precision, FS, 64, seconds=0.5)
    assert got["check"] == "ok", got["mismatch"]


@PRECISIONS
@pytest.mark.parametrize("settings", [dict(threshold=-30.0, ratio=10.0, knee=12.0, attack=1.0,
                                           release=40.0, makeup=-2.0, lookahead=5.0),
                                      dict(threshold=-12.0, ratio=2.0, knee=2.0, attack=30.0,
                                           release=400.0, makeup=6.0, lookahead=0.0)])
def test_compressor_loop_agrees_on_other_settings(lib, precision, settings):
    case = bare.BareCase("compressor", "compressor", "comp", settings)
    got = bare.check_bare(lib, case, precision, FS, 64, seconds=0.5)
    assert got["check"] == "ok", got["mismatch"]


def test_float_loops_follow_the_double_loops(lib):
    # Runs whatever the Processor offers: the float loop computes the same maths as the double
    # loop, so it follows it to float rounding (1e-5 here, as the float32 check's bound).
    proc = bare.make_processor("compressor", FS, 2, 0, "float64", **bare.COMP_SETTINGS)
    x = noise_bursts(5, FS // 2, 2, FS)
    outs = {}
    for prec in bare.PRECISIONS:
        s = lib.state("comp", prec, proc.p)
        y = np.zeros_like(x)
        lib.drive("comp", prec, s, proc.p, x, x, y, 64)
        outs[prec] = y
    diff = np.abs(outs["float32"].astype(np.float64) - outs["float64"])
    assert 0.0 < diff.max() <= 1e-5  # they differ (two precisions), but only by rounding
    assert np.abs(outs["float64"]).max() > 0.1  # and the signal was not silence


# ---- mismatches are caught --------------------------------------------------------------------

@PRECISIONS
@pytest.mark.parametrize("name,slot,delta", [("compressor", P_THRESHOLD, 0.5),
                                             ("limiter", P_RELEASE, 5.0),
                                             ("ducker (stereo key)", P_ATTACK, 2.0)])
def test_a_parameter_changed_on_one_side_is_a_mismatch(lib, precision, name, slot, delta):
    proc = bare.make_processor(CASES[name].algorithm, FS, 2, CASES[name].key_channels,
                               precision, **CASES[name].settings)
    p = proc.p.copy()
    p[slot] += delta
    got = bare.check_bare(lib, CASES[name], precision, FS, 64, seconds=0.5, p_bare=p)
    assert got["check"] == "MISMATCH"
    assert got["mismatch"] and got["max_abs_diff"] > bare.TOLERANCE[precision]


def _perturb_bare_side(monkeypatch):
    orig = bare.Pair.__init__

    def init(self, *a, **k):
        orig(self, *a, **k)
        self.p_bare = self.p_bare.copy()
        self.p_bare[P_THRESHOLD] += 1.0

    monkeypatch.setattr(bare.Pair, "__init__", init)


def test_mismatch_gets_no_timings_and_the_command_exits_1(lib, monkeypatch, capsys):
    import livedyn.bench.kernels as bk
    from livedyn.bench.__main__ import main

    _perturb_bare_side(monkeypatch)
    monkeypatch.setattr(bk, "run_kernels", lambda **kw: [])  # only the bare sections here
    monkeypatch.setattr(bare, "run_curves", lambda **kw: [])
    assert main(["kernels", "--quick", "--blocksize", "64"]) == 1
    text = capsys.readouterr().out
    rows = [ln for ln in text.splitlines() if ln.startswith(tuple(CASES))]
    assert len(rows) == len(CASES) * len(bare.PRECISIONS)
    # the compressor and the ducker read the threshold; the limiter has none (still agrees)
    assert sum("MISMATCH" in ln and "no timings" in ln for ln in rows) == 2 * len(
        bare.PRECISIONS)
    assert "MISMATCH (no timings): compressor 64" in text


def test_knee_the_loop_does_not_cover_is_refused_in_one_line(lib):
    proc = bare.make_processor("compressor", FS, 2, 0, "float64", knee=0.0)
    with pytest.raises(ValueError, match="not covered") as e:
        lib.state("comp", "float64", proc.p)
    assert "\n" not in str(e.value)
    p = proc.p.copy()
    p[P_KNEE] = 6.0
    assert lib.state("comp", "float64", p).size > 0


def test_bad_arguments_are_refused_in_one_line(lib):
    proc = bare.make_processor("compressor", FS, 2, 0, "float64")
    s = lib.state("comp", "float64", proc.p)
    x = np.zeros((64, 2), np.float32)
    for call, what in [(lambda: lib.drive("comp", "float64", s, proc.p, x.astype(np.float64), x,
                                          x, 64), "float32"),
                       (lambda: lib.drive("comp", "float64", s, proc.p, x[:, :1].copy(), x,
                                          x[:, :1].copy(), 64), "(frames, 2)"),
                       (lambda: lib.drive("comp", "float16", s, proc.p, x, x, x, 64),
                        "precision"),
                       (lambda: lib.drive("gate", "float64", s, proc.p, x, x, x, 64), "config"),
                       (lambda: lib.drive("comp", "float64", s, proc.p, x, x, x, 0),
                        "blocksize")]:
        with pytest.raises(ValueError, match=None) as e:
            call()
        assert what in str(e.value) and "\n" not in str(e.value)
    with pytest.raises(ValueError, match="precision"):
        bare.make_processor("compressor", FS, 2, 0, "float16")


def test_the_library_is_built_in_its_own_cache_folder(lib):
    assert lib.path.parent == bare.BUILD_DIR and lib.path.name.startswith("bare-")
    assert lib.path.with_suffix(".h").exists()  # the generated header beside it, for reading


# ---- the tables -------------------------------------------------------------------------------

def test_bare_table_has_its_columns_and_rows(lib):
    lines = []
    rows = bare.run_bare(blocksizes=(64,), seconds=0.1, repeats=2, out=lines.append,
                         progress=None, lib=lib)
    head = next(ln for ln in lines if ln.startswith("case"))
    for col in ("block", "prec", "check", "numba", "bare C", "numba/C", "paired", "inst numba"):
        assert col in head
    assert [(r["case"], r["precision"]) for r in rows] == [
        (c.name, p) for c in bare.BARE_CASES for p in bare.PRECISIONS]
    for r in rows:
        assert set(r) == set(bare.BARE_ROW_KEYS)
        assert r["check"] == "ok" and r["repeats"] == 2
        assert r["numba_ns_min"] <= r["numba_ns_per_frame"] <= r["numba_ns_max"]
        assert r["bare_ns_min"] <= r["bare_ns_per_frame"] <= r["bare_ns_max"]
        assert r["numba_over_bare"] == pytest.approx(r["numba_ns_per_frame"]
                                                     / r["bare_ns_per_frame"])
        assert r["instances_per_core"] == math.floor(0.7e9 / (FS * r["numba_ns_per_frame"]))
        assert r["bare_instances_per_core"] == math.floor(0.7e9 / (FS * r["bare_ns_per_frame"]))


def test_curve_section_checks_both_curves_and_reports_the_targets(lib):
    lines = []
    rows = bare.run_curves(blocksizes=(64,), seconds=0.1, repeats=2, out=lines.append,
                           progress=None, lib=lib)
    assert [r["precision"] for r in rows] == list(bare.PRECISIONS)
    for r in rows:
        assert r["check"] == "ok", r["mismatch"]
        assert r["same_params_equal"]
        if r["precision"] == "float64":
            # the same curve through a call: the same samples; the costlier curve: the same
            # samples as the bare loop with the same two extra calls
            assert r["same_max_abs_diff"] == 0.0 and r["costly_max_abs_diff"] == 0.0
        for k in ("builtin", "same", "costly", "c", "c_x"):
            assert r[f"{k}_ns_per_frame"] > 0
        assert r["same_over_builtin"] == pytest.approx(r["same_ns_per_frame"]
                                                       / r["builtin_ns_per_frame"])
        assert r["numba_extra"]["diff_min"] <= r["numba_extra_ns"] <= r["numba_extra"]["diff_max"]
        assert r["c_extra"]["diff_min"] <= r["c_extra_ns"] <= r["c_extra"]["diff_max"]
    text = "\n".join(lines)
    assert "same/bi" in text and "+n/+C" in text
    assert text.count(" met") + text.count(" missed") == 2 * len(rows)


def test_curve_files_differ_only_in_the_extra_calls(tmp_path):
    files = bare.write_curves(tmp_path)
    same = files["same"].read_text().splitlines()
    costly = files["costly"].read_text().splitlines()
    differ = [(a, b) for a, b in zip(same, costly) if a != b]
    assert len(same) == len(costly) and len(differ) == 3  # docstring, NAME, the return line
    assert "math.tanh" in differ[-1][1] and "math.log" in differ[-1][1]


def test_json_report_carries_the_bare_and_curve_rows(lib, monkeypatch, tmp_path):
    import json

    import livedyn.bench.kernels as bk
    from livedyn.bench.__main__ import main

    monkeypatch.setattr(bk, "run_kernels", lambda **kw: [])
    out = tmp_path / "k.json"
    assert main(["kernels", "--quick", "--blocksize", "64", "--json", str(out)]) == 0
    doc = json.loads(out.read_text())
    assert len(doc["bare"]) == len(bare.BARE_CASES) * len(bare.PRECISIONS)
    assert [r["precision"] for r in doc["curves"]] == list(bare.PRECISIONS)


# ---- --algorithm ------------------------------------------------------------------------------

def test_algorithm_reports_the_stage_cost_in_every_precision(tmp_path):
    from livedyn.bench.user import format_user, run_user

    path = bare.write_curves(tmp_path)["costly"]
    res = run_user(path, blocksizes=(64,), quick=True)
    precs = ["float64", "float32"]
    assert res["precisions"] == precs
    assert [(r["precision"], r["algorithm"].split(" ")[0]) for r in res["rows"]] == [
        (p, n) for p in precs for n in ("bench-costly-curve", "compressor")]
    assert [s["precision"] for s in res["stage"]] == precs
    for s in res["stage"]:
        assert s["diff_min"] <= s["diff_ns"] <= s["diff_max"]
    text = format_user(res)
    for p in precs:
        assert re.search(rf"^{p}\s+64\s", text, re.M)


def test_a_user_file_is_loaded_in_the_precision_asked(tmp_path):
    from livedyn.loader import load

    path = bare.write_curves(tmp_path)["same"]
    for prec in bare.PRECISIONS:
        proc = bare.make_processor(load(path), FS, 2, 0, prec)  # a float64 Algorithm given
        assert proc.precision == prec and proc.algorithm.precision == prec


def test_algorithm_baseline_keeps_the_files_settings(tmp_path):
    from livedyn.loader import load
    from livedyn.params import LAW_COMPRESSOR, P_LAW, P_USER_CURVE

    path = bare.write_curves(tmp_path)["same"]
    up = bare.make_processor(load(path), FS, 2, 0, "float64", threshold=-31.0, ratio=3.0)
    bp = bare.make_processor("compressor", FS, 2, 0, "float64")
    p = bare._shared_params(up.p, bp.p)
    assert p[P_THRESHOLD] == -31.0 and p[P_LAW] == LAW_COMPRESSOR and p[P_USER_CURVE] == 0.0


def test_command_line_algorithm_prints_each_precision(tmp_path):
    # through `python -m livedyn` from the repository, so that this tree's livedyn runs
    path = bare.write_curves(tmp_path)["same"]
    r = subprocess.run([sys.executable, "-m", "livedyn", "bench", "kernels", "--algorithm",
                        str(path), "--quick"], capture_output=True, text=True, timeout=600,
                       cwd=ROOT)
    assert r.returncode == 0, r.stderr
    assert "stages over the compressor" in r.stdout
    for p in bare.PRECISIONS:
        for bs in (64, 1024):
            assert re.search(rf"^{p}\s+{bs}\s", r.stdout, re.M), r.stdout
