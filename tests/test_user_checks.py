"""Load-time checks of user algorithm files, the starting templates, the shipped examples, and
the commands around them (check, new-algorithm, render, bench kernels, run --watch)."""
from __future__ import annotations

import json
import re
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest

import livedyn
from livedyn.algorithms.template import BODIES, template_text
from livedyn.loader import UserAlgorithmError, load
from livedyn.shipped import examples_folder

ROOT = Path(__file__).resolve().parent.parent
EXAMPLES = sorted(examples_folder().glob("*.py"))
LIVEDYN = Path(sys.executable).parent / "livedyn"


def write(tmp_path, text, name="algo.py"):
    f = tmp_path / name
    f.write_text(textwrap.dedent(text))
    return f


def test_three_examples_ship():
    assert [p.name for p in EXAMPLES] == ["loudness_ducker.py", "program_release.py",
                                          "speech_key.py"]


@pytest.mark.parametrize("path", EXAMPLES, ids=lambda p: p.stem)
def test_each_example_passes_the_checks_and_renders(path, tmp_path):
    from livedyn.render import Setup, render
    from livedyn.wavio import read_wav, write_wav

    alg = load(path)
    report = "\n".join(alg.report)
    for words in ("bounds-checked pass: no out-of-bounds access", "allocation: none",
                  "finite output: yes", "gain above makeup: none", "bit-identical",
                  "time per frame"):
        assert words in report, report
    rng = np.random.default_rng(5)
    x = (0.3 * rng.standard_normal((24000, 2))).astype(np.float32)
    write_wav(tmp_path / "in.wav", x, 48000)
    key = None
    if "key" in alg.schema:  # a keyed example renders with a key file of its own
        key = tmp_path / "key.wav"
        write_wav(key, (0.2 * rng.standard_normal((24000, 1))).astype(np.float32), 48000)
    render(tmp_path / "in.wav", tmp_path / "out.wav", Setup(algorithm=str(path)), key_path=key)
    y, fs = read_wav(tmp_path / "out.wav")
    assert fs == 48000 and y.shape == x.shape and np.isfinite(y).all()
    assert np.max(np.abs(y)) <= np.max(np.abs(x)) + 1e-6  # no boost (makeup 0)


@pytest.mark.parametrize("stage", list(BODIES))
def test_each_starting_template_loads_and_passes(stage, tmp_path):
    f = write(tmp_path, template_text("start", stage))
    alg = load(f)
    assert alg.stages == (stage,)
    assert any("time per frame" in line for line in alg.report)


def test_the_speed_check_is_a_ratio_to_the_compressor_timed_alongside(tmp_path, monkeypatch):
    # livedyn.checks, check 6: the file's time is judged against the built-in compressor's,
    # measured in the same check, so a machine that is slow for both refuses nothing.
    from livedyn import checks

    f = write(tmp_path, template_text("fast", "gain_curve"))
    alg = load(f)
    line = next(ln for ln in alg.report if ln.startswith("time per frame"))
    ratio = float(re.search(r"stereo, ([\d.]+) times the built-in compressor", line).group(1))
    assert 0 < ratio < checks.MAX_OVER_COMPRESSOR  # a curve costs about what the compressor does
    # the verdict itself: a busy machine (both 50 times slower) accepts what an idle one does
    for scale in (1.0, 50.0):
        assert "times the built-in" in checks.speed_verdict(f, 60.0 * scale, 50.0 * scale)
    with pytest.raises(UserAlgorithmError, match=r"too slow for live use: .* 81 times"):
        checks.speed_verdict(f, 81.0 * 50.0, 50.0)
    # and the check uses it: a file timed at 100 times the compressor is refused
    monkeypatch.setattr(checks, "time_against_compressor", lambda alg, fs: (6000.0, 60.0))
    g = write(tmp_path, template_text("slow", "gain_curve") + "\n# another version\n", "s.py")
    with pytest.raises(UserAlgorithmError, match="100 times the built-in compressor"):
        load(g)


def test_a_declared_block_based_kernel_is_accepted_and_reported(tmp_path):
    # the gain is chosen once per host block from the block's peak: the output depends on how
    # the host splits the stream, which is refused unless the file declares BLOCK (below)
    text = '''
    PARAMS = ["threshold"]
    BLOCK = 64
    LATENCY = 0

    def kernel(x, key, out, p, s):
        pk = 0.0
        for n in range(x.shape[0]):
            pk = max(pk, abs(x[n, 0]))
        g = 1.0 if pk < 0.5 else 0.5
        for n in range(x.shape[0]):
            for c in range(x.shape[1]):
                out[n, c] = x[n, c] * g
    '''
    alg = load(write(tmp_path, text))
    line = next(ln for ln in alg.report if ln.startswith("block size"))
    assert "block-based, frame 64, latency 0 samples (declared)" in line
    # the same without the declaration is refused, naming the reason
    undeclared = text.replace("BLOCK = 64\n", "").replace("LATENCY = 0\n", "")
    with pytest.raises(UserAlgorithmError, match="depends on the host block size"):
        load(write(tmp_path, undeclared, "undeclared.py"))


def test_boost_is_accepted_when_declared(tmp_path):
    text = 'PARAMS = ["threshold"]\n{decl}\ndef gain_curve(x, p):\n    return 3.0\n'
    with pytest.raises(UserAlgorithmError, match=r"\+3.00 dB above makeup"):
        load(write(tmp_path, text.format(decl="")))
    alg = load(write(tmp_path, text.format(decl="BOOST = True"), "declared.py"))
    assert any("+3.00 dB (declared: BOOST = True)" in ln for ln in alg.report), alg.report


def test_a_kernel_that_leaves_output_unwritten_is_refused(tmp_path):
    text = '''
    PARAMS = ["threshold"]
    def kernel(x, key, out, p, s):
        for n in range(x.shape[0]):
            out[n, 0] = x[n, 0]
    '''
    with pytest.raises(UserAlgorithmError, match="not finite.*write every out"):
        load(write(tmp_path, text))


def test_allocation_per_call_is_refused_at_load(tmp_path):
    text = '''
    import numpy as np
    PARAMS = ["threshold", "ratio"]
    def gain_curve(x, p):
        a = np.zeros(4)
        a[0] = min(0.0, p[P.threshold] - x)
        return a[0] * 0.0
    '''
    f = write(tmp_path, text)
    # the compiled code's check (livedyn.dsp.ircheck) refuses it before any run
    with pytest.raises(UserAlgorithmError) as e:
        load(f)
    assert "gain_curve allocates in the audio thread" in str(e.value)
    assert str(e.value).startswith(f"{f.resolve()}:") or str(e.value).startswith(f"{f}:")
    # negative control: the same without the array reports none
    plain = load(write(tmp_path, "PARAMS = ['threshold', 'ratio']\n"
                                 "def gain_curve(x, p):\n    return 0.0\n", "plain.py"))
    assert "allocation: none per call" in plain.report


def test_detector_and_smoother_state_rows_are_apart(tmp_path):
    # both stages write slot 0 of their own row; if they shared it, the detector would see the
    # smoother's (negative, dB) value and the level would collapse
    text = '''
    PARAMS = ["threshold", "ratio", "knee"]
    STATE = ["v"]
    def detector(k, p, s):
        if s[S.v] < 0.0:
            return -1.0e3
        s[S.v] = max(abs(k), 0.999 * s[S.v])
        return s[S.v]
    def smoother(g, p, s):
        s[S.v] = g - 1.0
        return g
    '''
    alg = load(write(tmp_path, text))
    proc = livedyn.Processor(alg, 48000, 1, threshold=-20, ratio=4, knee=0)
    x = np.full((4800, 1), 0.5, np.float32)
    y, tr = proc.process_traced(x)
    assert np.all(tr["detector_db"][100:] > -7.0)  # 0.5 -> -6 dB, held by the detector's row


def test_cli_check_and_full_message(tmp_path):
    f = write(tmp_path, "PARAMS = ['threshold']\ndef gain_curve(x, p):\n    return 'a' + x\n")
    r = subprocess.run([str(LIVEDYN), "check", str(f)], capture_output=True, text=True,
                       timeout=300)
    assert r.returncode == 2
    err = [ln for ln in r.stderr.splitlines() if ln.startswith("livedyn: error:")]
    assert len(err) == 1 and "algo.py:3" in err[0] and "--full" in err[0], r.stderr
    r = subprocess.run([str(LIVEDYN), "check", str(f), "--full"], capture_output=True,
                       text=True, timeout=300)
    assert r.returncode == 2 and "No implementation of function" in r.stderr
    assert len(r.stderr.splitlines()) > 5  # the whole compiler message, on request


def test_cli_new_algorithm_never_overwrites(tmp_path):
    r = subprocess.run([str(LIVEDYN), "new-algorithm", "soft"], capture_output=True, text=True,
                       timeout=300, cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    text = (tmp_path / "soft.py").read_text()
    r = subprocess.run([str(LIVEDYN), "new-algorithm", "soft"], capture_output=True, text=True,
                       timeout=300, cwd=tmp_path)
    assert r.returncode == 2 and "exists" in r.stderr
    assert (tmp_path / "soft.py").read_text() == text
    r = subprocess.run([str(LIVEDYN), "check", "soft.py"], capture_output=True, text=True,
                       timeout=300, cwd=tmp_path)
    assert r.returncode == 0 and "checks passed" in r.stdout, r.stderr


@pytest.mark.parametrize("path", EXAMPLES, ids=lambda p: p.stem)
def test_bench_kernels_times_each_example_beside_the_compressor(path, tmp_path):
    out = tmp_path / "b.json"
    # `python -m livedyn` from the repository: this tree's livedyn, whatever the venv installed
    r = subprocess.run([sys.executable, "-m", "livedyn", "bench", "kernels", "--algorithm",
                        str(path), "--quick", "--precision", "float64", "--json", str(out)],
                       capture_output=True,
                       text=True, timeout=600, cwd=ROOT)
    assert r.returncode == 0, r.stderr
    name = load(path).name
    doc = json.loads(out.read_text())["kernels"]
    assert doc["precisions"] == ["float64"]  # as asked (tests/test_bench_bare.py: both)
    rows = [r for r in doc["rows"] if r["precision"] == "float64"]
    assert [r["blocksize"] for r in rows] == [64, 64, 1024, 1024]
    assert [s["blocksize"] for s in doc["stage"] if s["precision"] == "float64"] == [64, 1024]
    for user, base in (rows[0:2], rows[2:4]):
        assert user["algorithm"].startswith(f"{name} (") and base["algorithm"] == "compressor"
        assert user["ns_per_frame"] > 0 and base["ns_per_frame"] > 0
        assert user["over_baseline"] == pytest.approx(user["ns_per_frame"] /
                                                      base["ns_per_frame"])
        # both are the same kind of per-sample work: within 10x of each other (a broken timer,
        # say one that timed nothing, would not be)
        assert 0.1 < user["over_baseline"] < 10


REFUSED = {
    "mono breaks it": ("PARAMS = ['threshold']\ndef kernel(x, key, out, p, s):\n"
                       "    for n in range(x.shape[0]):\n        out[n, 0] = x[n, 0]\n"
                       "        out[n, 1] = x[n, 1]\n",
                       "kernel reads or writes out of bounds with 1 channel(s)"),
    "a mono key breaks it": ("PARAMS = ['threshold']\ndef kernel(x, key, out, p, s):\n"
                             "    for n in range(x.shape[0]):\n"
                             "        for c in range(x.shape[1]):\n"
                             "            out[n, c] = x[n, c] * (1.0 - 0.0 * key[n, 1])\n",
                             "key width 1"),
    "an index from a parameter": ("PARAMS = [Param('slot', '', 0, 100, 0)]\nSTATE = 4\n"
                                  "def detector(k, p, s):\n    s[int(p[P.slot])] = abs(k)\n"
                                  "    return abs(k)\n",
                                  "parameters at their highest"),
    "raise": ("PARAMS = [Param('mode', '', 0, 1, 0)]\ndef gain_curve(x, p):\n"
              "    if p[P.mode] > 0.5:\n        raise ValueError('mode')\n    return 0.0\n",
              "algo.py:4: refused: raise in a function"),
    "assert": ("PARAMS = ['threshold']\ndef gain_curve(x, p):\n    assert x < 100\n"
               "    return 0.0\n", "algo.py:3: refused: assert in a function"),
    "a latency the engine cannot delay": ("PARAMS = ['threshold']\nLATENCY = 100000\n"
                                          "def kernel(x, key, out, p, s):\n    pass\n",
                                          "LATENCY = 100000: expected a whole number of "
                                          "samples from 0 to 16384"),
}


@pytest.mark.parametrize("case", list(REFUSED))
def test_unsafe_files_are_refused_with_the_reason(case, tmp_path):
    text, words = REFUSED[case]
    with pytest.raises(UserAlgorithmError) as e:
        load(write(tmp_path, text))
    assert words in str(e.value) and "\n" not in str(e.value), str(e.value)


def test_cli_run_watch_hears_an_edit_of_the_file(tmp_path):
    """The new user's path: a gain curve in a file, run live headless on the demo scenario,
    edited while it plays; the run reports the new version and no failed load."""
    f = write(tmp_path, template_text("mine", "gain_curve"), "mine.py")
    stats = tmp_path / "stats.json"
    proc = subprocess.Popen([str(LIVEDYN), "run", "--headless", "--key-demo", "--algorithm",
                             str(f), "--watch", "--seconds", "9", "--no-ui", "--stats-json",
                             str(stats)], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, cwd=tmp_path)
    t_end = time.monotonic() + 120
    text = f.read_text()
    edited = watching = False
    lines = []
    while time.monotonic() < t_end and proc.poll() is None:
        line = proc.stdout.readline()
        lines.append(line)
        watching = watching or line.startswith("watching")
        # edit once the run has played 2 s (its status line says so), not after a fixed sleep
        played = re.match(r"\s*(\d+\.\d) s  in ", line)
        if watching and not edited and played and float(played.group(1)) >= 2.0:
            tmp = f.with_name("mine.py.part")
            tmp.write_text(text.replace("0.0, 1.0, 0.75", "0.0, 1.0, 0.5"))
            tmp.replace(f)
            edited = True
    out, err = proc.communicate(timeout=60)
    lines += out.splitlines()
    assert proc.returncode == 0, err
    assert edited
    assert any("info: mine.py: version 2 running" in ln for ln in lines), "".join(lines)
    snap = json.loads(stats.read_text())
    assert snap["watch"]["versions_swapped"] == 1 and snap["watch"]["failed_loads"] == 0
    assert snap["watch"]["swaps"][0]["carried"]  # the running values were carried over
