"""The precision audit: it finds what float32 changes, and says where.

The bound (audit.BOUND_DB, 0.01 dB of gain) is our own; README.md, "Precision", states it and
names the shipped setting that passes it only away from its threshold.
"""
import os
import subprocess
import sys

import numpy as np
import pytest

from livedyn import audit as au
from livedyn import checks
from livedyn.render import Setup

FS = 48000.0


def test_the_programme_parts_cover_the_test_programme():
    x, _ = checks.test_programme(FS, 2)
    assert len(x) == round(len(au.PROGRAMME_PARTS) * au.PART_SECONDS * FS)
    # the loudest part is where the parts say: the 0 dBFS sine
    i = au.PROGRAMME_PARTS.index("sine 0 dBFS")
    seg = x[int(i * au.PART_SECONDS * FS):int((i + 1) * au.PART_SECONDS * FS), 0]
    assert 20 * np.log10(np.abs(seg).max()) == pytest.approx(0.0, abs=0.01)


def test_a_compressor_stays_within_the_bound_and_every_stage_is_reported():
    a = au.audit(Setup(algorithm="compressor", settings=[("threshold", "-30")]))
    (r,) = a.rows
    assert a.within and r.gain_max_db is not None
    assert 0 < r.gain_max_db <= au.BOUND_DB  # float32 differs, a little
    assert r.gain_rms_db <= r.gain_max_db
    assert set(r.stages) == set(au.STAGES)
    assert r.worst_part in au.PROGRAMME_PARTS
    assert r.out_max_dbfs < -60 and r.out_rms_dbfs <= r.out_max_dbfs
    text = au.format_audit(a)
    assert "within the bound" in text and "stage maxima" in text


def test_a_gate_threshold_on_a_steady_level_flips_and_the_audit_says_so():
    # the test programme holds a -50 dBFS sine: with the threshold there, the peak level sits
    # within rounding of it and the two precisions open the gate at different samples
    on = au.audit(Setup(algorithm="gate", settings=[("threshold", "-50"), ("hysteresis", "6")]))
    (r,) = on.rows
    assert not on.within and r.flipped and r.worst_part == "sine -50 dBFS"
    assert "threshold decision flipped" in au.format_audit(on)
    off = au.audit(Setup(algorithm="gate", settings=[("threshold", "-47"),
                                                     ("hysteresis", "6")]))
    assert off.within and not off.rows[0].flipped


def test_a_wav_file_is_audited_after_the_programme(tmp_path):
    from livedyn.wavio import write_wav

    rng = np.random.default_rng(2)
    write_wav(tmp_path / "take.wav", (0.2 * rng.standard_normal((24000, 1))).astype(np.float32),
              44100)
    a = au.audit(Setup(algorithm="limiter"), inputs=[tmp_path / "take.wav"])
    assert [r.signal for r in a.rows] == ["test programme", str(tmp_path / "take.wav")]
    assert a.rows[1].seconds == pytest.approx(24000 / 44100)


def test_a_failed_plot_leaves_the_old_one(tmp_path, monkeypatch):
    pytest.importorskip("matplotlib")
    a = au.audit(Setup(algorithm="compressor"))
    target = tmp_path / "diff.png"
    au.plot(a, target)
    old = target.read_bytes()
    assert old.startswith(b"\x89PNG")
    import matplotlib.figure

    def broken(self, *args, **kw):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(matplotlib.figure.Figure, "savefig", broken)
    with pytest.raises(OSError):
        au.plot(a, target)
    assert target.read_bytes() == old
    assert sorted(os.listdir(tmp_path)) == ["diff.png"]


def _cli(*args):
    return subprocess.run([sys.executable, "-m", "livedyn", "precision-audit", *args],
                          capture_output=True, text=True, timeout=600)


def test_every_shipped_preset_and_example_is_audited_and_only_the_named_one_is_over():
    r = _cli("--every")
    assert r.returncode == 1, r.stdout + r.stderr
    audited = [ln.split(": ", 1)[1].split(",")[0] for ln in r.stdout.splitlines()
               if ln.startswith("precision audit: ")]
    from livedyn.presets import list_presets, presets_dir
    from livedyn.shipped import examples_folder

    assert audited == [n for n, _, _ in list_presets(presets_dir())] + \
        sorted(p.name for p in examples_folder().glob("*.py"))
    # README.md, "Precision": the narrator gate's threshold sits on a level of the programme
    assert r.stdout.strip().splitlines()[-1] == "over the 0.01 dB bound: narrator-gate"


@pytest.mark.parametrize("args,message", [
    (["--plot", "diff.txt"], "--plot diff.txt: expected a .png file name"),
    (["--every", "--algorithm", "gate"], "--every audits every shipped preset"),
    (["--algorithm", "nosuch"], "unknown algorithm 'nosuch'"),
    (["--set", "thresh=-500"], "threshold = -500"),
])
def test_bad_input_is_one_line(args, message):
    r = _cli(*args)
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and message in lines[0], r.stderr


def test_the_plot_never_replaces_an_input(tmp_path):
    from livedyn.wavio import write_wav

    f = tmp_path / "in.png"  # a WAV file under a .png name
    write_wav(f, np.zeros((4800, 1), np.float32), 48000)
    before = f.read_bytes()
    r = _cli(str(f), "--plot", str(f))
    assert r.returncode == 2 and "which the command reads" in r.stderr
    assert f.read_bytes() == before
