"""Hostile algorithm files: each refused with one line naming the file and what happened,
while the process that loads it goes on (livedyn.vet).

The cases are those a careful user could write by mistake or on purpose: an endless loop (at
the top level and in a stage), a crash (a write through a null pointer), ``sys.exit`` and
``os._exit``, a huge allocation, NaN output, an out-of-bounds state write, and a top-level
``os.system`` that a preset listing must not run.
"""
from __future__ import annotations

import os
import sys
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from livedyn import loader as user, vet
from livedyn.algorithms.user import UserAlgorithmError

LIVEDYN = Path(sys.executable).parent / "livedyn"

GOOD = '''"""a plain curve"""
PARAMS = ["threshold", "attack", "release", "makeup"]
{top}

def gain_curve(level_db, p):
    over = level_db - p[P.threshold]
    if over <= 0.0:
        return 0.0
    {body}
    return -0.5 * over
'''


def _file(tmp_path, name, top="", body="pass", text=None):
    p = tmp_path / f"{name}.py"
    p.write_text(text if text is not None else GOOD.format(top=top, body=body))
    return p


def _refused(path, word, **limits):
    with pytest.raises(UserAlgorithmError) as e:
        user.load(path)
    msg = str(e.value)
    assert "\n" not in msg and str(path.resolve()) in msg and word in msg, msg
    return msg


@pytest.mark.parametrize("name,top,word", [
    ("top_exit", "import sys\nsys.exit(0)", "called sys.exit(0) while being loaded"),
    ("top_os_exit", "import os\nos._exit(3)", "ended the process (exit code 3)"),
    ("top_crash", "import ctypes\nctypes.string_at(0)", "crashed while being loaded: a read or "
                                                         "write outside its memory (SIGSEGV)"),
    ("top_alloc", "import numpy as np\nBIG = np.ones(2**40)", "MemoryError"),
])
def test_top_level_hostile_code_is_refused_in_the_child(tmp_path, name, top, word):
    _refused(_file(tmp_path, name, top), word)
    assert os.getpid() == os.getpid()  # still here: the process was not taken down


def test_endless_loops_are_stopped(tmp_path, monkeypatch):
    monkeypatch.setattr(vet, "VET_SECONDS", 3.0)
    _refused(_file(tmp_path, "top_loop", "while True:\n    pass"),
             "did not finish within 3 s while being loaded")
    monkeypatch.setattr(vet, "VET_SECONDS", 4.0)
    _refused(_file(tmp_path, "stage_loop", body="while over > -1.0:\n        over += 0.0"),
             "did not finish within 4 s while being checked")


def test_stage_allocating_2_to_the_40_is_refused(tmp_path):
    path = _file(tmp_path, "stage_alloc", "import numpy as np",
                 body="a = np.zeros(2**40)\n    over += a[0]")
    # refused at compile time by the real-time check of the compiled stage (it allocates),
    # before any of its code can run
    _refused(path, "allocates")


def test_nan_output_is_refused(tmp_path):
    _refused(_file(tmp_path, "nan_out", body="return over * np.nan", top="import numpy as np"),
             "output is not finite")


SMOOTHER = '''PARAMS = ["threshold", "ratio", "knee", "makeup"]
STATE = 1

def smoother(gain_db, p, s):
    s[1000000] = gain_db
    return gain_db
'''


def test_out_of_bounds_state_write_is_refused_not_a_crash(tmp_path, capsys):
    from livedyn import cli

    path = _file(tmp_path, "oob", text=SMOOTHER)
    assert cli.main(["check", str(path)]) == 2  # the bounds pass runs first: no segfault
    err = capsys.readouterr().err.strip()
    assert "\n" not in err and "smoother reads or writes out of bounds" in err


def test_good_file_passes_with_the_childs_report(tmp_path):
    alg = user.load(_file(tmp_path, "good"))
    assert any(line.startswith("bounds-checked pass") for line in alg.report)
    assert any(line.startswith("time per frame") for line in alg.report)


def test_presets_never_import_an_algorithm_file(tmp_path, capsys, monkeypatch):
    from livedyn import cli

    marker = tmp_path / "ran"
    alg = _file(tmp_path, "sneaky", f"import os\nos.system('touch {marker}')")
    folder = tmp_path / "presets"
    folder.mkdir()
    (folder / "s.toml").write_text(f'preset_format = 1\nalgorithm_file = "{alg}"\n'
                                   '[params]\nthreshold = -20\n')
    from livedyn import presets

    rows = presets.list_presets(folder)
    assert [r[0] for r in rows] == ["s"]
    pr = presets.load(folder / "s.toml")
    presets.dumps(pr)
    assert cli.main(["presets", "--show", str(folder / "s.toml")]) == 0
    assert "algorithm_file" in capsys.readouterr().out
    assert not marker.exists()
    # running it says first which file will run
    monkeypatch.chdir(tmp_path)
    sf.write(tmp_path / "in.wav", np.zeros((4800, 1), np.float32), 48000, subtype="FLOAT")
    assert cli.main(["render", "in.wav", "--out", "o.wav", "--preset",
                     str(folder / "s.toml")]) == 0
    out = capsys.readouterr().out
    first = [ln for ln in out.splitlines() if str(alg) in ln][0]
    assert "runs the algorithm file" in first and "Python code" in first
    assert out.index(first) < out.index("-> o.wav")
    assert out.count(first) == 1 and marker.exists()  # said once, then it ran
