"""The port kit: golden vectors, the C reference and its runner (livedyn.port.kit).

The C reference (livedyn/port/c/livedyn_ref.c) transcribes the numba kernels operation for
operation; built without fast math and with -ffp-contract=off it must reproduce livedyn's
output and every stage's trace bit for bit (README "Port kit"). The speech-key example's stages
are ported by hand in livedyn/examples/speech_key.c and must do the same.
"""
import json
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest

from livedyn import cli
from livedyn.checks import test_programme as programme
from livedyn.port.kit import KitError, write_kit
from livedyn.render import Setup, parse_setting

EXAMPLES = Path(__file__).resolve().parents[1] / "livedyn" / "examples"
CC = shutil.which("cc") or shutil.which("gcc")
needs_cc = pytest.mark.skipif(CC is None, reason="no C compiler (cc or gcc) on this machine")


def build_and_run(kit, *extra):
    make = shutil.which("make")
    c = kit / "c"
    if make:
        r = subprocess.run([make, "-s", "-C", str(c), f"CC={CC}", "ld_runner"],
                           capture_output=True, text=True, timeout=300)
    else:
        srcs = ["runner.c", "livedyn_ref.c", "stages.c"]
        r = subprocess.run([CC, "-std=c11", "-O2", "-fno-fast-math", "-ffp-contract=off", "-o",
                            "ld_runner", *srcs, "-lm"], cwd=c, capture_output=True, text=True,
                           timeout=300)
    assert r.returncode == 0, r.stderr
    return subprocess.run([str(c / "ld_runner"), str(kit), *extra], capture_output=True,
                          text=True, timeout=300)


def stage_lines(text):
    return [ln.split() for ln in text.splitlines()
            if ln.startswith("  ") and ln.split()[0] in ("output", "key_filtered",
                                                       "detector_db", "curve_db", "gain_db",
                                                       "total_gain_db")]


def test_vectors_and_manifest(tmp_path):
    kit = tmp_path / "kit"
    m = write_kit(kit, Setup(algorithm="compressor",
                             settings=[parse_setting("threshold=-30")]))
    assert m["block_sizes"] == [64, 1000] and len(m["kernel_parameters"]) == 64
    assert m["kernel_parameters"][0] == -30.0 and m["settings"]["threshold"] == "-30 dBFS"
    assert set(m["versions"]) == {"livedyn", "numba", "numpy"}
    assert m["stages"]["gain_db"]["tolerance_max"] == 0.01
    x, _ = programme(48000.0, 2)
    for bs in (64, 1000):
        main = np.fromfile(kit / f"block-{bs}" / "main.f32", "<f4").reshape(-1, 2)
        assert main.tobytes() == x.tobytes()  # the load checks' programme, unchanged
        gain = np.fromfile(kit / f"block-{bs}" / "gain_db.f32", "<f4")
        assert len(gain) == m["frames"] and gain.min() < -10  # the sine steps compress
    assert json.loads((kit / "manifest.json").read_text())["c_stages"] == "built-in stages only"


def test_user_wav_is_appended_to_the_programme(tmp_path):
    import soundfile as sf

    tone = (0.25 * np.sin(2 * np.pi * 440 * np.arange(4800) / 48000)).astype(np.float32)
    sf.write(str(tmp_path / "mine.wav"), tone, 48000, subtype="FLOAT")
    kit = tmp_path / "kit"
    m = write_kit(kit, Setup(algorithm="ducker"), wavs=[tmp_path / "mine.wav"],
                  blocksizes=(32, 500))
    part = m["programme"][-1]
    assert part["name"] == "mine.wav" and part["frames"] == 4800
    assert m["block_sizes"] == [32, 500] and m["key_channels"] == 1
    main = np.fromfile(kit / "block-32" / "main.f32", "<f4").reshape(-1, 2)
    key = np.fromfile(kit / "block-32" / "key.f32", "<f4")
    np.testing.assert_array_equal(main[part["start"]:, 0], tone)  # mono spread to both
    np.testing.assert_array_equal(main[part["start"]:, 1], tone)
    np.testing.assert_array_equal(key[part["start"]:], tone)  # its first channel keys
    with pytest.raises(KitError, match="44100 Hz, expected 48000 Hz"):
        sf.write(str(tmp_path / "other.wav"), tone, 44100, subtype="FLOAT")
        write_kit(tmp_path / "kit2", Setup(), wavs=[tmp_path / "other.wav"])


@needs_cc
@pytest.mark.parametrize("setup", [Setup(algorithm="compressor"),
                                   Setup(preset="drums-ceiling"),
                                   Setup(algorithm=str(EXAMPLES / "speech_key.py"))],
                         ids=["compressor", "true-peak limiter preset", "speech-key example"])
def test_c_reference_reproduces_the_vectors_bit_for_bit(tmp_path, setup):
    kit = tmp_path / "kit"
    write_kit(kit, setup)
    r = build_and_run(kit, "--exact")
    assert r.returncode == 0, r.stdout + r.stderr
    rows = stage_lines(r.stdout)
    assert len(rows) == 12  # six stages at each of the two block sizes
    assert all(row[1] == "0" and row[2] == "0" and row[5] == "pass" for row in rows)
    # the runner can fail: one sample of the output off by 1e-3 is caught at both block sizes
    for bs in (64, 1000):
        f = kit / f"block-{bs}" / "output.f32"
        y = np.fromfile(f, "<f4")
        y[5000] += np.float32(1e-3)
        y.tofile(f)
    r = build_and_run(kit)
    assert r.returncode == 1 and "FAIL" in r.stdout
    out = [row for row in stage_lines(r.stdout) if row[0] == "output"]
    assert all(abs(float(row[1]) - 1e-3) < 1e-6 and row[5] == "FAIL" for row in out)


@needs_cc
def test_algorithm_file_gets_a_skeleton_that_builds(tmp_path):
    kit = tmp_path / "kit"
    m = write_kit(kit, Setup(algorithm=str(EXAMPLES / "program_release.py")))
    assert "skeleton" in m["c_stages"]
    stages = (kit / "c" / "stages.c").read_text()
    assert "static double smoother(double gain_db, const double *p, double *s)" in stages
    slots = (kit / "c" / "stages_slots.h").read_text()
    assert "#define P_threshold 0" in slots and "#define NSTATE" in slots
    r = build_and_run(kit)
    assert r.returncode == 1 and "FAIL" in r.stdout  # unfilled, it cannot pass


def test_whole_kernel_file_and_used_folder_are_one_line_errors(tmp_path, capsys):
    with pytest.raises(KitError, match="whole kernel"):
        write_kit(tmp_path / "k", Setup(algorithm=str(EXAMPLES / "loudness_ducker.py")))
    (tmp_path / "used").mkdir()
    (tmp_path / "used" / "keep.txt").write_text("mine")
    rc = cli.main(["port-kit", "--out", str(tmp_path / "used")])
    err = capsys.readouterr().err
    assert rc == 2 and err.count("\n") == 1 and "not empty" in err
    assert (tmp_path / "used" / "keep.txt").read_text() == "mine"
