"""Tests for livedyn.presets: TOML presets, validation messages, round trip, atomic save.

Outside references: TOML 1.0.0 (https://toml.io/en/v1.0.0) for what is valid syntax and for
the float literals ``inf`` and ``nan``; Python's tomllib as the reference TOML parser.
Message wording is our own design (one line, file name first): no source.
"""
from __future__ import annotations

import math
import os
import tomllib
from pathlib import Path

import pytest

import livedyn
from livedyn import algorithms, presets
from livedyn.params import ParamError
from livedyn.presets import Preset, PresetError

GOOD = """\
# a hand-written preset
preset_format = 1
algorithm = "compressor"
description = "vocal levelling"

[params]
threshold = -18
ratio = "3:1"
attack = 5.5
detector = "rms"
key_hpf = "off"
"""


def _write(tmp_path, text, name="bad.toml"):
    p = tmp_path / name
    if isinstance(text, bytes):
        p.write_bytes(text)
    else:
        p.write_text(text, encoding="utf-8")
    return p


def _load_error(path_or_name, where=None) -> str:
    with pytest.raises(PresetError) as e:
        presets.load(path_or_name)
    msg = str(e.value)
    assert "\n" not in msg, msg
    assert isinstance(e.value, ParamError)
    start = str(where if where is not None else path_or_name)
    assert msg.startswith(start), msg
    return msg


def _head(body, algorithm="compressor"):
    return f'preset_format = 1\nalgorithm = "{algorithm}"\n\n[params]\n{body}\n'


# ---------------------------------------------------------------------------------------------
# A good preset


def test_load_good(tmp_path):
    p = _write(tmp_path, GOOD, "vocal.toml")
    pr = presets.load(p)
    assert pr.algorithm == "compressor"
    assert pr.description == "vocal levelling"
    assert pr.source == p and pr.algorithm_file is None
    v = pr.values
    assert v["threshold"] == -18.0
    assert v["ratio"] == 3.0
    assert v["attack"] == 5.5
    assert v["detector"] == 1.0  # index of "rms" in the detector choices
    assert v["key_hpf"] == 0.0  # off
    # Parameters the file leaves out take the algorithm's defaults; nothing else is added.
    schema = algorithms.get("compressor").schema
    assert set(v) == set(schema.names())
    assert v["release"] == schema["release"].default
    assert v["knee"] == schema["knee"].default


def test_hand_edit_forms(tmp_path):
    # Forms a person may type: units in text, TOML's inf literal, booleans for on/off.
    p = _write(tmp_path, _head('threshold = "-24 dBFS"\nratio = inf\nrelease = "200 ms"\n'
                               'automakeup = true\nkey_hpf = 80'))
    v = presets.load(p).values
    assert v["threshold"] == -24.0
    assert math.isinf(v["ratio"]) and v["ratio"] > 0
    assert v["release"] == 200.0
    assert v["automakeup"] == 1.0
    assert v["key_hpf"] == 80.0


def test_params_table_optional(tmp_path):
    p = _write(tmp_path, 'preset_format = 1\nalgorithm = "gate"\n')
    pr = presets.load(p)
    schema = algorithms.get("gate").schema
    assert pr.values == {q.name: q.default for q in schema}


def test_algorithm_file_resolved_relative_to_preset(tmp_path):
    sub = tmp_path / "mine"
    sub.mkdir()
    p = _write(sub, 'preset_format = 1\nalgorithm_file = "../algos/soft.py"\n'
                    '[params]\nthreshold = -30\nratio = "2:1"\n', "soft.toml")
    pr = presets.load(p)
    assert pr.algorithm_file == (tmp_path / "algos" / "soft.py").resolve()
    assert pr.algorithm == "soft"
    # The schema is not known yet: only the given values, checked against all parameters.
    assert pr.values == {"threshold": -30.0, "ratio": 2.0}
    # Once the user algorithm's schema is known, the caller checks again.
    with pytest.raises(PresetError, match=r"params.ratio: not a parameter of soft"):
        pr.checked(algorithms.get("gate").schema)
    assert pr.checked(algorithms.get("compressor").schema) is pr


# ---------------------------------------------------------------------------------------------
# Malformed presets: each gives one line that starts with the file name and names the value.

BAD = [
    # (id, file text, text the message must contain)
    ("syntax", _head("ratio = = 4"), ":5:9: invalid TOML"),
    ("unclosed-table", 'preset_format = 1\nalgorithm = "compressor"\n[params\n',
     ":3:8: invalid TOML"),
    ("unknown-top-key", 'preset_format = 1\nalgorithm = "compressor"\nalgo = "x"\n',
     ":3: unknown key 'algo': expected one of preset_format, algorithm, algorithm_file"),
    ("top-level-param", 'preset_format = 1\nalgorithm = "compressor"\nthreshold = -3\n',
     "unknown key 'threshold'"),
    ("wrong-type-array", _head("threshold = [1, 2]"),
     ":5: threshold = [1, 2]: expected a number, -80 to 0 dBFS, got an array"),
    ("wrong-type-table", _head("[params.ratio]\nx = 1"), "ratio = {'x': 1}"),
    ("wrong-type-date", _head("attack = 1979-05-27"),
     ":5: attack = 1979-05-27: expected a number"),
    ("wrong-type-algorithm", "preset_format = 1\nalgorithm = 3\n",
     ":2: algorithm = 3: expected text naming one of compressor"),
    ("wrong-type-description", _head("").replace("[params]", "description = 5\n[params]"),
     "description = 5: expected text"),
    ("params-not-table", 'preset_format = 1\nalgorithm = "compressor"\nparams = 3\n',
     ":3: params = 3: expected a table [params]"),
    ("out-of-range", _head("ratio = 0.5"), ":5: ratio = 0.5: out of range, expected 1 to inf"),
    ("out-of-range-threshold-inf", _head("threshold = inf"), "threshold = inf: out of range"),
    ("negative-time", _head("attack = -5"), ":5: attack = -5 ms: out of range, expected 0 to 500"),
    ("filter-below-range", _head("key_hpf = 5"), "key_hpf = 5 Hz: out of range"),
    ("nan", _head("attack = nan"), ":5: attack = nan: expected a number"),
    ("bad-ratio-text", _head('ratio = "4:x"'),
     ":5: ratio = '4:x': expected a ratio such as 4, '4:1' or 'inf'"),
    ("bad-number-text", _head('threshold = "loud"'), "threshold = 'loud': expected a number"),
    ("bad-choice", _head('detector = "average"'),
     ":5: detector = 'average': expected one of peak, rms"),
    ("missing-format", 'algorithm = "compressor"\n', "missing key preset_format"),
    ("missing-algorithm", "preset_format = 1\n[params]\nthreshold = -3\n",
     "missing key algorithm: expected algorithm = one of compressor, limiter"),
    ("both-algorithm-keys",
     'preset_format = 1\nalgorithm = "gate"\nalgorithm_file = "x.py"\n',
     ":3: both algorithm and algorithm_file given"),
    ("empty-algorithm-file", 'preset_format = 1\nalgorithm_file = ""\n',
     "algorithm_file = '': expected text with the path"),
    ("unknown-algorithm", 'preset_format = 1\nalgorithm = "compresor"\n',
     ":2: algorithm = 'compresor': unknown algorithm, expected one of compressor"),
    ("unknown-version", 'preset_format = 2\nalgorithm = "compressor"\nnew_key = 1\n',
     ":1: preset_format = 2: unsupported version, expected 1"),
    ("version-as-text", 'preset_format = "1"\nalgorithm = "compressor"\n',
     "preset_format = '1': expected the whole number 1, got text"),
    ("param-not-in-schema", _head("threshold = -10", algorithm="limiter"),
     ":5: params.threshold = -10: not a parameter of limiter, expected one of ceiling"),
    ("param-unknown-anywhere", _head("loudness = 3"), "params.loudness = 3: not a parameter"),
    ("only-comments", "# nothing here\n\n# at all\n", "no settings (only comments)"),
    ("empty", "", "empty file"),
    ("whitespace-only", "  \n\n \t\n", "empty file"),
    ("binary-junk", bytes(range(256)) * 4, "binary data (NUL byte at offset 0)"),
    ("non-utf8", 'preset_format = 1\nalgorithm = "compressor"\ndescription = "caf\xe9"\n'
     .encode("latin-1"), ":3: not UTF-8 text (byte 0xe9 at offset"),
]


@pytest.mark.parametrize("text, needle", [b[1:] for b in BAD], ids=[b[0] for b in BAD])
def test_malformed(tmp_path, text, needle):
    p = _write(tmp_path, text)
    msg = _load_error(p)
    assert needle in msg, msg


def test_malformed_count():
    assert len(BAD) >= 15


def test_directory(tmp_path):
    d = tmp_path / "folder.toml"
    d.mkdir()
    msg = _load_error(d)
    assert "is a directory, expected a preset file" in msg


def test_file_not_found(tmp_path):
    p = tmp_path / "nope.toml"
    msg = _load_error(p)
    assert "no such file" in msg


def test_too_large(tmp_path):
    p = _write(tmp_path, "# " + "x" * (presets.MAX_BYTES + 10) + "\n")
    assert "too large" in _load_error(p)


@pytest.mark.skipif(not hasattr(os, "geteuid") or os.geteuid() == 0,
                    reason="root can read files without read permission")
def test_unreadable(tmp_path):
    p = _write(tmp_path, GOOD)
    p.chmod(0)
    try:
        assert "cannot read" in _load_error(p)
    finally:
        p.chmod(0o644)


# ---------------------------------------------------------------------------------------------
# Name lookup and listing


@pytest.fixture
def folder(tmp_path, monkeypatch):
    d = tmp_path / "shipped"
    d.mkdir()
    (d / "vocal.toml").write_text(GOOD)
    (d / "duck.toml").write_text('preset_format = 1\nalgorithm = "ducker"\n'
                                 'description = "music under speech"\n')
    (d / "broken.toml").write_text('preset_format = 1\nalgorithm = "compressor"\n'
                                   '[params]\nratio = -3\n')
    (d / "notes.txt").write_text("not a preset")
    monkeypatch.setenv(presets.ENV_DIR, str(d))
    return d


def test_lookup_by_name(folder):
    pr = presets.load("vocal")
    assert pr.source == folder / "vocal.toml"
    assert pr.values["ratio"] == 3.0


def test_lookup_unknown_name(folder):
    msg = _load_error("nosuch", where=folder / "nosuch.toml")
    assert "no preset named 'nosuch'" in msg
    assert "expected one of broken, duck, vocal" in msg


def test_lookup_broken_by_name(folder):
    msg = _load_error("broken", where=folder / "broken.toml")
    assert ":4: ratio = -3: out of range" in msg


def test_path_with_suffix_is_not_a_name(folder, tmp_path, monkeypatch):
    # "vocal.toml" has a suffix: read as a path relative to the working directory
    monkeypatch.chdir(tmp_path)
    msg = _load_error("vocal.toml")
    assert "no such file" in msg


def test_list_presets(folder):
    errors = []
    out = presets.list_presets(on_error=errors.append)
    assert out == [("duck", "music under speech", "ducker"),
                   ("vocal", "vocal levelling", "compressor")]
    assert len(errors) == 1
    assert errors[0].startswith(str(folder / "broken.toml") + ":4: ratio = -3")


def test_list_presets_warns_by_default(folder):
    with pytest.warns(presets.PresetWarning, match="broken.toml"):
        out = presets.list_presets()
    assert [n for n, _, _ in out] == ["duck", "vocal"]


def test_default_folder(monkeypatch):
    # The shipped presets are package data (livedyn/presets/); the repository's top-level
    # presets/ is a symbolic link to that folder, so both name the same files.
    monkeypatch.delenv(presets.ENV_DIR, raising=False)
    expect = Path(livedyn.__file__).resolve().parent / "presets"
    assert presets.presets_dir() == expect
    top = expect.parent.parent / "presets"
    if top.exists():  # a clone (an installed wheel has no top-level folder)
        assert top.is_symlink() and top.resolve() == expect


def test_shipped_presets_all_load(monkeypatch):
    monkeypatch.delenv(presets.ENV_DIR, raising=False)
    files = sorted(presets.presets_dir().glob("*.toml"))
    assert len(files) == 6  # the demo's six (README, "Two commands on a fresh ... machine")
    errors = []
    listed = presets.list_presets(on_error=errors.append)
    assert errors == []
    assert len(listed) == len(files)


# ---------------------------------------------------------------------------------------------
# Saving


def _full_preset():
    schema = algorithms.get("compressor").schema
    values = {p.name: p.default for p in schema}
    values.update(threshold=-17.25, ratio=math.inf, attack=0.1, release=1000 / 3,
                  detector=1.0, ballistics=1.0, link=2.0, key_hpf=0.0, key_lpf=12000.0,
                  makeup=2.0000000000000004, mix=37.5)
    return Preset("compressor", values, "a description")


def test_round_trip(tmp_path):
    pr = _full_preset()
    p = tmp_path / "rt.toml"
    presets.save(pr, p)
    back = presets.load(p)
    assert back.algorithm == pr.algorithm
    assert back.description == pr.description
    assert back.values == pr.values  # exact, incl. inf, 1000/3 and a value one ulp above 2
    # The file is plain TOML (tomllib) in our layout, with text forms for ratio and choices.
    doc = tomllib.loads(p.read_text())
    assert doc["preset_format"] == 1 and doc["algorithm"] == "compressor"
    assert doc["params"]["ratio"] == "inf"
    assert doc["params"]["detector"] == "rms"
    assert doc["params"]["link"] == "none"
    assert doc["params"]["key_hpf"] == "off"
    assert doc["params"]["threshold"] == -17.25
    # Saving what was loaded gives the same bytes.
    p2 = tmp_path / "rt2.toml"
    presets.save(back, p2)
    assert p2.read_bytes() == p.read_bytes()


@pytest.mark.parametrize("ratio, text", [(4.0, "4:1"), (2.5, "2.5:1"), (1.0, "1:1"),
                                         (10 / 3, "3.3333333333333335:1")])
def test_ratio_written_as_ratio_text(tmp_path, ratio, text):
    pr = Preset("compressor", {"ratio": ratio})
    p = tmp_path / "r.toml"
    presets.save(pr, p)
    assert tomllib.loads(p.read_text())["params"]["ratio"] == text
    assert presets.load(p).values["ratio"] == ratio


def test_round_trip_every_builtin(tmp_path):
    for name in algorithms.names():
        schema = algorithms.get(name).schema
        pr = Preset(name, {p.name: p.default for p in schema})
        p = tmp_path / f"{name}.toml"
        presets.save(pr, p)
        assert presets.load(p).values == pr.values, name


def test_round_trip_algorithm_file(tmp_path):
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    src = _write(tmp_path / "a", 'preset_format = 1\nalgorithm_file = "soft.py"\n'
                                 '[params]\nratio = "inf"\n', "x.toml")
    pr = presets.load(src)
    presets.save(pr, tmp_path / "b" / "y.toml")
    back = presets.load(tmp_path / "b" / "y.toml")
    assert back.algorithm_file == pr.algorithm_file == (tmp_path / "a" / "soft.py").resolve()
    assert back.values == {"ratio": math.inf}


def _existing(tmp_path):
    p = tmp_path / "keep.toml"
    p.write_text(GOOD)
    return p, p.read_bytes()


def _temps(tmp_path):
    return [q.name for q in tmp_path.iterdir() if q.name.endswith(".tmp")]


def test_atomic_save_replace_fails(tmp_path, monkeypatch):
    p, before = _existing(tmp_path)

    def boom(src, dst):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(presets.os, "replace", boom)
    with pytest.raises(PresetError) as e:
        presets.save(_full_preset(), p)
    assert str(e.value).startswith(str(p)) and "No space left" in str(e.value)
    assert p.read_bytes() == before
    assert _temps(tmp_path) == []


def test_atomic_save_fails_midway(tmp_path, monkeypatch):
    # The temporary file exists and holds data when fsync fails.
    p, before = _existing(tmp_path)
    seen = []

    def bad_fsync(fd):
        seen.append(_temps(tmp_path))
        raise OSError(5, "Input/output error")

    monkeypatch.setattr(presets.os, "fsync", bad_fsync)
    with pytest.raises(PresetError, match="Input/output error"):
        presets.save(_full_preset(), p)
    assert seen and len(seen[0]) == 1  # a temp file was really there mid-write
    assert p.read_bytes() == before
    assert _temps(tmp_path) == []


def test_atomic_save_serialiser_fails(tmp_path, monkeypatch):
    p, before = _existing(tmp_path)

    def bad_dumps(obj, **kw):
        raise TypeError("Object of type X is not TOML serializable")

    monkeypatch.setattr(presets.tomli_w, "dumps", bad_dumps)
    with pytest.raises(PresetError, match="cannot be written as TOML"):
        presets.save(_full_preset(), p)
    assert p.read_bytes() == before
    assert _temps(tmp_path) == []


@pytest.mark.parametrize(
    "values, needle",
    [
        ({"ratio": math.nan}, "ratio = nan"),
        ({"attack": -1.0}, "attack = -1 ms: out of range"),
        ({"detector": 7.0}, "detector = 7: out of range"),
        ({"detector": 0.5}, "detector = 0.5 would read back as 0.0"),
        ({"ceiling_db": 0.0}, "params.ceiling_db: not a parameter of compressor"),
    ],
)
def test_save_refuses_bad_values(tmp_path, values, needle):
    p, before = _existing(tmp_path)
    with pytest.raises(PresetError) as e:
        presets.save(Preset("compressor", values), p)
    msg = str(e.value)
    assert "\n" not in msg and msg.startswith(str(p)) and needle in msg, msg
    assert p.read_bytes() == before
    assert _temps(tmp_path) == []


def test_save_unknown_algorithm(tmp_path):
    with pytest.raises(PresetError, match="unknown algorithm 'fuzz'"):
        presets.save(Preset("fuzz", {}), tmp_path / "f.toml")
    assert list(tmp_path.iterdir()) == []


def test_save_keeps_permissions(tmp_path):
    p, _ = _existing(tmp_path)
    p.chmod(0o640)
    presets.save(_full_preset(), p)
    assert (p.stat().st_mode & 0o777) == 0o640
