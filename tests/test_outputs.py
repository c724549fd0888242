"""The output guard (livedyn.outputs) on ``render``, ``run``, ``measure`` and ``demo``.

Every pair of an input option and an output option of ``run`` and ``render`` naming the same
file is refused with one line and exit code 2, nothing written; so are non-regular targets (a
FIFO, a character device) and missing folders. A take folder is never written into twice.
Rules: the README's "Nothing overwritten" paragraph (common practice, no source).
"""
from __future__ import annotations

import os
import stat

import numpy as np
import pytest
import soundfile as sf

from livedyn import cli
from livedyn.outputs import OutputError, Outputs, check_target, short

FS = 48000


@pytest.fixture
def work(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    x = (0.5 * np.sin(2 * np.pi * 440 * np.arange(FS // 10) / FS)).astype(np.float32)
    sf.write(tmp_path / "in.wav", x, FS, subtype="FLOAT")
    sf.write(tmp_path / "key.wav", x, FS, subtype="FLOAT")
    (tmp_path / "auto.txt").write_text(f"livedyn-automation 1 samplerate {FS}\n0 threshold -20\n")
    (tmp_path / "p.toml").write_text('algorithm = "compressor"\n[values]\nthreshold = -20\n')
    return tmp_path


def _fails(argv, capsys):
    code = cli.main(argv)
    err = capsys.readouterr().err
    assert code == 2, err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("livedyn: error: "), err
    assert "Traceback" not in err
    return lines[0]


def _snapshot(folder):
    return {p: p.read_bytes() for p in folder.rglob("*") if p.is_file()}


RENDER_INPUTS = {"IN.wav": "in.wav", "--key": "key.wav", "--automation": "auto.txt",
                 "--preset": "p.toml"}
RENDER_OUTPUTS = ["--out", "--summary-json", "--trace"]


@pytest.mark.parametrize("inp", sorted(RENDER_INPUTS))
@pytest.mark.parametrize("out", RENDER_OUTPUTS)
def test_render_output_onto_an_input_is_refused(work, capsys, inp, out):
    target = RENDER_INPUTS[inp]
    argv = {"IN.wav": "in.wav", "--out": "o.wav", "--key": "key.wav",
            "--automation": "auto.txt", "--preset": "p.toml"}
    if out == "--trace":  # the folder's files: make the input live where a trace file goes
        os.mkdir("T")
        os.replace(target, "T/output.wav")
        argv = {k: ("T/output.wav" if v == target else v) for k, v in argv.items()}
        argv["--trace"] = "T"
    else:
        argv[out] = target
    before = _snapshot(work)
    line = _fails(["render", argv.pop("IN.wav")] + [a for kv in argv.items() for a in kv],
                  capsys)
    assert "is the same file as" in line and "choose another name" in line
    assert _snapshot(work) == before


@pytest.mark.parametrize("a,b", [("--out", "--summary-json"), ("--out", "--trace"),
                                 ("--summary-json", "--trace")])
def test_render_outputs_onto_each_other_are_refused(work, capsys, a, b):
    names = {"--out": "o.wav", "--summary-json": "s.json", "--trace": "T"}
    if "--trace" in (a, b):
        other = a if b == "--trace" else b
        names[other] = "T/output.wav" if other == "--out" else "T/trace.json"
    else:
        names[b] = names[a]
    argv = ["render", "in.wav"] + [x for kv in names.items() for x in kv]
    line = _fails(argv, capsys)
    assert "is the same file as" in line
    assert not os.path.exists("o.wav") and not os.path.exists("T")


def test_hard_link_and_symlink_to_the_input_are_refused(work, capsys):
    os.link("in.wav", "hard.wav")
    os.symlink("in.wav", "soft.wav")
    for name in ("hard.wav", "soft.wav"):
        line = _fails(["render", "in.wav", "--out", name], capsys)
        assert "is the same file as IN.wav in.wav" in line


def test_symlink_loop_is_one_line(work, capsys):
    os.symlink("loop2", "loop1")
    os.symlink("loop1", "loop2")
    assert "loop of symbolic links" in _fails(["render", "in.wav", "--out", "loop1"], capsys)
    assert "loop1" in _fails(["render", "loop1", "--out", "o.wav"], capsys)


def _mknod_chr(path):
    try:
        os.mknod(path, 0o666 | stat.S_IFCHR, os.makedev(1, 3))  # like /dev/null
    except PermissionError:
        pytest.skip("mknod of a character device needs root (CAP_MKNOD)")


@pytest.mark.parametrize("kind", ["fifo", "chr"])
@pytest.mark.parametrize("option", ["--out", "--summary-json"])
def test_render_onto_a_fifo_or_a_device_is_refused(work, capsys, kind, option):
    node = work / "node"
    if kind == "fifo":
        os.mkfifo(node)
    else:
        _mknod_chr(node)
    argv = ["render", "in.wav", "--out", "o.wav"]
    argv[argv.index("--out") + 1 if option == "--out" else len(argv):] = \
        [str(node)] if option == "--out" else [option, str(node)]
    line = _fails(argv, capsys)
    assert ("a FIFO" if kind == "fifo" else "a character device") in line
    assert "expected a regular file or a new name" in line
    mode = os.stat(node).st_mode
    assert (stat.S_ISFIFO if kind == "fifo" else stat.S_ISCHR)(mode)  # still the node


def test_missing_folder_is_one_line_before_work(work, capsys):
    line = _fails(["render", "in.wav", "--out", "nope/o.wav"], capsys)
    assert "folder nope does not exist" in line
    line = _fails(["run", "--key-demo", "--seconds", "1", "--stats-json", "nope/s.json",
                   "--no-ui"], capsys)
    assert "--stats-json nope/s.json: folder nope does not exist" in line


RUN_INPUTS = {"--input-file": "in.wav", "--key-file": "key.wav", "--preset": "p.toml"}


@pytest.mark.parametrize("inp", sorted(RUN_INPUTS))
@pytest.mark.parametrize("out", ["--stats-json", "--record"])
def test_run_output_onto_an_input_is_refused_before_any_stream(work, capsys, inp, out):
    target = RUN_INPUTS[inp]
    argv = ["run", "--headless", "--no-ui", inp, target]
    if out == "--record":
        # the input is a take file: R holds a take, so the run records into R-2 (said in one
        # line) and the input is untouched; --main-inputs 0 stops the run at argument checking
        os.mkdir("R")
        os.replace(target, "R/out.wav")
        argv[-1] = "R/out.wav"
        before = _snapshot(work)
        line = _fails(argv + ["--record", "R", "--main-inputs", "0"], capsys)
        assert "--main-inputs" in line
        assert _snapshot(work) == before and not os.path.exists("R-2")
        return
    argv += [out, target]
    before = _snapshot(work)
    line = _fails(argv, capsys)
    assert "is the same file as" in line
    assert "headless: JACK server" not in capsys.readouterr().out
    assert _snapshot(work) == before


def test_run_stats_inside_the_take_is_refused(work, capsys):
    line = _fails(["run", "--headless", "--no-ui", "--key-demo", "--record", "R",
                   "--stats-json", "R/out.wav"], capsys)
    assert "--record" in line and "is the same file as" in line


def test_second_take_gets_a_numbered_folder_and_stats_move_with_it(work):
    os.mkdir("R")
    (work / "R" / "main.wav").write_bytes(b"old take")
    (work / "R-2").mkdir()
    (work / "R-2" / "out.wav").write_bytes(b"older")
    g = Outputs()
    g.take("--record", "R")
    g.write("--stats-json", "R/stats.json")
    assert g.check()["take"] == "R-3"
    assert g.moved("R/stats.json") == os.path.join("R-3", "stats.json")


def test_empty_take_folder_is_used_as_it_is(work):
    os.mkdir("R")
    g = Outputs()
    g.take("--record", "R")
    assert g.check()["take"] == "R" and g.notes == []


def test_record_onto_a_file_is_refused(work):
    with pytest.raises(OutputError) as e:
        g = Outputs()
        g.take("--record", "in.wav")
        g.check()
    assert "is a file, expected a folder" in str(e.value)


def test_measure_json_onto_the_preset_and_a_fifo(work, capsys):
    assert "is the same file as --preset" in _fails(
        ["measure", "latency", "--preset", "p.toml", "--json", "p.toml"], capsys)
    os.mkfifo("f")
    assert "a FIFO" in _fails(["measure", "latency", "--json", "f"], capsys)


def test_demo_refuses_its_arguments_before_making_its_folder(work, capsys):
    _fails(["demo", "--out", "d", "--seconds", "0", "--offline-only"], capsys)
    assert not os.path.exists("d")
    (work / "file").write_text("x")
    assert "expected a folder" in _fails(["demo", "--out", "file", "--offline-only"], capsys)


def test_preset_save_refuses_a_fifo(work):
    from livedyn import presets

    os.mkfifo("f.toml")
    with pytest.raises(presets.PresetError) as e:
        presets.save(presets.Preset("compressor", {}, ""), "f.toml")
    assert "a FIFO" in str(e.value)


def test_replaced_output_keeps_its_mode(work, capsys):
    (work / "o.wav").write_bytes(b"x")
    os.chmod("o.wav", 0o600)
    assert cli.main(["render", "in.wav", "--out", "o.wav"]) == 0
    assert stat.S_IMODE(os.stat("o.wav").st_mode) == 0o600


def test_check_target_and_short():
    with pytest.raises(OutputError):
        check_target("", "--out")
    s = short("x" * 900000)
    assert len(s) < 100 and "900000 characters" in s
