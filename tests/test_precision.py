"""The float32 variants: really single precision, the same behaviour, and a bounded error.

References beside the checks: IEEE 754-2019 binary32 (24-bit significand: a relative rounding
error of at most 2**-24 per operation) for what single precision can hold; the float64
kernels, which tests/test_dynamics.py and tests/test_limiter.py check against the published
equations, for what the float32 kernels must approximate.
"""
import re
import subprocess
import sys
from collections import Counter

import numba
import numpy as np
import pytest

import livedyn
from livedyn import loader
from livedyn.dsp import precision as prec
from livedyn.params import ParamError

FS = 48000


def _noise_bursts(frames, ch=2, seed=3):
    rng = np.random.default_rng(seed)
    x = 0.3 * rng.standard_normal((frames, ch))
    env = np.repeat(rng.choice([0.01, 0.1, 1.0], size=frames // 2400 + 1), 2400)[:frames]
    return (x * env[:, None]).astype(np.float32)


def _typed_float64_locals(dispatcher):
    bad = set()
    for sig in dispatcher.signatures:
        for var, ty in dispatcher.overloads[sig].type_annotation.typemap.items():
            if str(ty) == "float64" and not var.startswith("$"):
                bad.add(var.split(".")[0])
    return bad


def _fresh(dispatcher):
    """A fresh, uncached copy of a kernel, compiled for its signature (cached code carries no
    typing and cannot be inspected)."""
    fresh = numba.njit(nogil=True, error_model="numpy")(dispatcher.py_func)
    fresh.compile(dispatcher.signatures[0])
    return fresh


@pytest.mark.parametrize("alg", ["compressor", "limiter"])
def test_float32_kernel_is_single_precision_but_for_the_exact_counts(alg):
    proc = livedyn.Processor(alg, FS, 2, precision="float32")
    proc.process(np.zeros((4, 2), np.float32))
    fresh = _fresh(proc._kernel)
    # no float64 variable but the exact counts
    bad = _typed_float64_locals(fresh)
    assert bad <= prec.EXACT_LOCALS, sorted(bad - prec.EXACT_LOCALS)
    # single-precision maths only
    ir = fresh.inspect_llvm(fresh.signatures[0])
    calls = Counter(re.findall(r"call [^@]*@([A-Za-z0-9_.]+)\(", ir))
    double_math = {c for c in calls if re.fullmatch(
        r"llvm\.(exp|log|log10|pow|sin|cos|sqrt)\.f64|exp|log|log10|pow|sin|cos|sqrt", c)}
    single_math = {c for c in calls if c.endswith(".f32") or c in ("expf", "logf", "sqrtf")}
    assert not double_math, double_math
    assert single_math  # exp and log of the gain path
    ops = Counter(re.findall(r"= (fmul|fadd|fsub|fdiv) (double|float) ", ir))
    single = sum(n for (op, t), n in ops.items() if t == "float")
    double = sum(n for (op, t), n in ops.items() if t == "double")
    # the double arithmetic left is the exact sample counts (crossfade, hold, frames)
    assert single > double, ops
    # and the float64 kernel really is the other one: its gain path is float64
    locals64 = _typed_float64_locals(_fresh(livedyn.Processor(alg, FS, 2)._kernel))
    assert "y" in locals64 or "gp" in locals64


@pytest.mark.parametrize("alg", ["compressor", "limiter", "expander", "gate", "ducker"])
def test_float32_output_is_the_same_for_any_block_split(alg):
    # DEVELOPERS.md, "Identical output whatever the block split", for the float32 variants
    x = _noise_bursts(9000)
    kch = 1 if alg == "ducker" else 0
    key = _noise_bursts(9000, 1, seed=9) if kch else None
    outs = []
    for bs in (1, 64, 4097):
        p = livedyn.Processor(alg, FS, 2, kch, precision="float32", lookahead=2)
        y = np.concatenate([p.process(x[i:i + bs], None if key is None else key[i:i + bs])
                            for i in range(0, len(x), bs)])
        outs.append(y)
    assert np.array_equal(outs[0], outs[1]) and np.array_equal(outs[1], outs[2])


@pytest.mark.parametrize("alg", ["compressor", "limiter", "expander", "gate", "ducker"])
def test_float32_follows_float64_within_single_precision_error(alg):
    x = _noise_bursts(FS)
    kch = 1 if alg == "ducker" else 0
    key = _noise_bursts(FS, 1, seed=9) if kch else None
    a = livedyn.Processor(alg, FS, 2, kch, lookahead=1)
    b = livedyn.Processor(alg, FS, 2, kch, precision="float32", lookahead=1)
    ya, ta = a.process_traced(x, key)
    yb, tb = b.process_traced(x, key)
    g = np.abs(ta["total_gain_db"] - tb["total_gain_db"])
    # single precision: a dB value near 60 carries ~4e-6 dB of rounding per operation (2**-24
    # relative); through the one-poles and the dB conversions a few hundred ulps accumulate
    assert g.max() < 0.01, g.max()  # the bound the README states for the shipped presets
    assert 0 < np.abs(ya - yb).max() < 1e-3  # different, and close
    assert b.latency_samples == a.latency_samples


def test_precision_is_checked_with_one_line():
    with pytest.raises(ParamError, match=r"precision = 'half': expected float64 or float32"):
        livedyn.Processor("compressor", FS, 2, precision="half")
    assert prec.check("f32") == "float32" and prec.check("double") == "float64"


def test_a_user_file_in_float32_runs_its_own_arithmetic_in_single_precision(tmp_path):
    f = tmp_path / "soft.py"
    f.write_text(
        '"""A curve that saturates."""\nimport math\nPARAMS = ["threshold"]\n\n'
        'def gain_curve(level_db, p):\n'
        '    over = level_db - p[P.threshold]\n'
        '    if over <= 0.0:\n'
        '        return 0.0\n'
        '    return -12.0 * math.tanh(over / 12.0)\n')
    a64 = loader.load(f)
    a32 = loader.load(f, precision="float32")
    assert (a64.precision, a32.precision) == ("float64", "float32")
    # typed on a float32 level and the float64 parameter array: the rewritten curve stays in
    # float32 (its literals and parameter reads are single), the file as written does not
    sig = (numba.float32, numba.float64[::1])
    for alg, want in ((a32, "float32"), (a64, "float64")):
        fn = numba.njit(alg.module.gain_curve)
        fn.compile(sig)
        assert str(fn.nopython_signatures[0].return_type) == want
    x = _noise_bursts(FS // 2)
    y64 = livedyn.Processor(a64, FS, 2).process(x)
    y32 = livedyn.Processor(a32, FS, 2).process(x)
    assert 0 < np.abs(y64 - y32).max() < 1e-3
    with pytest.raises(ParamError, match="was compiled in float64; load it in float32"):
        livedyn.Processor(a64, FS, 2, precision="float32")


def test_a_float32_compile_error_names_the_users_line(tmp_path):
    f = tmp_path / "bad.py"
    f.write_text('PARAMS = ["threshold"]\n\n\ndef gain_curve(level_db, p):\n'
                 '    return 0.5 * ("a" + level_db)\n')
    for precision in ("float64", "float32"):  # the rewrite keeps the file's line numbers
        with pytest.raises(loader.UserAlgorithmError, match=r"bad\.py:5: gain_curve does not compile"):
            loader.load(f, precision=precision)


# Every example file in float32: `livedyn precision-audit --every` loads and runs each one in
# both precisions and bounds the difference (tests/test_audit.py).


def test_render_takes_the_precision_from_the_option_or_a_setting(tmp_path):
    from livedyn.wavio import read_wav, write_wav

    src = tmp_path / "in.wav"
    write_wav(src, _noise_bursts(FS // 2), FS)
    outs = {}
    for name, extra in (("f64", []), ("f32", ["--precision", "float32"]),
                        ("set", ["--set", "precision=float32"])):
        out = tmp_path / f"{name}.wav"
        r = subprocess.run([sys.executable, "-m", "livedyn", "render", str(src), "--out",
                            str(out), "--algorithm", "compressor", *extra],
                           capture_output=True, text=True, timeout=300)
        assert r.returncode == 0, r.stderr
        outs[name] = read_wav(out)[0]
    assert np.array_equal(outs["f32"], outs["set"])
    assert not np.array_equal(outs["f32"], outs["f64"])
    r = subprocess.run([sys.executable, "-m", "livedyn", "render", str(src), "--out",
                        str(tmp_path / "x.wav"), "--set", "precision=half"],
                       capture_output=True, text=True, timeout=300)
    assert r.returncode != 0
    assert r.stderr.strip().splitlines()[-1].endswith("expected float64 or float32")
    assert not (tmp_path / "x.wav").exists()


def test_a_live_change_of_precision_is_a_primed_crossfaded_swap(jack_server):
    from livedyn.engine import callback as cb
    from livedyn.engine.engine import ArraySource, Engine
    from tests.waiting import stream_until

    x = _noise_bursts(2 * FS)
    proc = livedyn.Processor("compressor", FS, 2, threshold=-30, lookahead=2)
    eng = Engine(proc, 64, main_source=ArraySource(x, loop=True))
    eng.start()
    try:
        stream_until(eng, 0.5)
        for want in ("float32", "float64", "float32"):
            swaps0 = int(eng.stats[cb.S_SWAPS])
            info = eng.swap(eng.proc.algorithm, precision=want)
            assert info["precision"] == want and eng.proc.precision == want
            slot = int(eng.ud[cb.U_KSLOT])
            assert eng.table[slot, 0] == prec.job_for("dynamics", want).address
            assert int(eng.stats[cb.S_SWAPS]) == swaps0 + 1
            assert eng.get("threshold") == -30.0  # values carried over
            frames = int(eng.stats[cb.S_FRAMES])
            stream_until(eng, frames / FS + 0.2)
        assert int(eng.stats[cb.S_NONFINITE_BLOCKS]) == 0
        with pytest.raises(ParamError, match="expected float64 or float32"):
            eng.swap(eng.proc.algorithm, precision="float16")
        assert eng.proc.precision == "float32"  # the refused change left it running
    finally:
        eng.stop()
