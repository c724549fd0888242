"""A take on a disk that fills up while ``livedyn run --record`` plays.

A small tmpfs is mounted for the test (as root); else a loop-mounted ext2 image; else the test
is skipped with the reason. Expected (the README's ``--record`` paragraph): one line on the
status output, the stream keeps playing, what was recorded is readable, the exit code is 4,
and the statistics are still written where there is room.
"""
from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
import soundfile as sf

from tests.conftest import jack_registry, jackd_pids

LIVEDYN = Path(sys.executable).parent / "livedyn"
SIZE_KB = 1536  # about 1.6 s of main (2 ch), key (1 ch) and out (2 ch) float at 48 kHz


def _mount_small(where: Path):
    where.mkdir()
    if os.geteuid() == 0 and shutil.which("mount"):
        r = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={SIZE_KB}k", "tmpfs",
                            str(where)], capture_output=True, text=True)
        if r.returncode == 0:
            return None
        tmpfs_error = r.stderr.strip()
        img = where.parent / "disk.img"
        with open(img, "wb") as f:
            f.truncate(SIZE_KB * 1024)
        r = subprocess.run(["mkfs.ext2", "-q", "-F", str(img)], capture_output=True, text=True)
        if r.returncode == 0:
            r = subprocess.run(["mount", "-o", "loop", str(img), str(where)],
                               capture_output=True, text=True)
            if r.returncode == 0:
                return None
        return f"cannot mount a small file system: tmpfs ({tmpfs_error}), loop ({r.stderr.strip()})"
    return "mounting a small file system needs root"


@pytest.fixture
def small_disk(tmp_path):
    where = tmp_path / "small"
    reason = _mount_small(where)
    if reason:
        pytest.skip(reason)
    try:
        yield where
    finally:
        subprocess.run(["umount", "-l", str(where)], capture_output=True)


def test_disk_full_while_recording_keeps_the_take_and_says_so(small_disk, tmp_path):
    rec = small_disk / "R"
    stats = tmp_path / "stats.json"
    r = subprocess.run([str(LIVEDYN), "run", "--headless", "--no-ui", "--key-demo",
                        "--seconds", "3", "--record", str(rec), "--stats-json", str(stats)],
                       capture_output=True, text=True, timeout=120, cwd=tmp_path)
    print(r.stdout, r.stderr)
    assert "Traceback" not in r.stdout + r.stderr
    assert r.returncode == 4, r.stderr
    name = re.search(r"^headless: JACK server (\S+)", r.stdout, re.M).group(1)
    assert not jackd_pids(name) and name not in [n for _, n in jack_registry()]
    told = [ln for ln in r.stdout.splitlines() if "recording stopped" in ln]
    assert len(told) == 1 and "No space left on device" in told[0], r.stdout
    t_told = float(told[0].split()[0])
    # the stream played on: status lines until the end of the run
    status = [float(ln.split()[0]) for ln in r.stdout.splitlines()
              if re.match(r"^\s*\d+\.\d s  in ", ln)]
    # (the proof that it played on is the block count below; on a loaded machine the notice
    # and the last status line can share their second)
    assert status and status[-1] >= 2.0 and status[-1] >= t_told
    err = r.stderr.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("livedyn: error: recording stopped"), err
    lengths = []
    for f in ("main", "key", "out"):
        data, fs = sf.read(rec / f"{f}.wav", dtype="float32", always_2d=True)
        lengths.append(len(data))
    assert min(lengths) > 0.5 * 48000  # the part that fitted is there and readable
    snap = json.loads(stats.read_text())  # written where there was room
    assert snap["record_error"].startswith("recording stopped") and snap["blocks"] > 2 * 750


def test_stats_on_the_full_disk_is_one_line(small_disk, tmp_path):
    with open(small_disk / "filler", "wb") as f:  # leave no room at all
        try:
            while True:
                f.write(b"\0" * 65536)
        except OSError:
            pass
    r = subprocess.run([str(LIVEDYN), "run", "--headless", "--no-ui", "--key-demo",
                        "--seconds", "1.5", "--stats-json", str(small_disk / "s.json")],
                       capture_output=True, text=True, timeout=120, cwd=tmp_path)
    print(r.stdout, r.stderr)
    assert "Traceback" not in r.stdout + r.stderr
    assert r.returncode == 4
    err = r.stderr.strip().splitlines()
    assert len(err) == 1 and "--stats-json" in err[0] and "No space left" in err[0]
    assert not [n for n in os.listdir(small_disk) if n.endswith(".tmp")]
