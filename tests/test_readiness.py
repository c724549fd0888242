"""livedyn ready: every item, its JSON, the native wake-up measurement, and the readings of
kernel, swap and sound-device state from synthesised /proc and /sys trees.

Sources: getrlimit(2), proc(5) (meminfo, fd links, asound status files), clock_nanosleep(2);
the kernel's /sys/kernel/debug/sched/preempt format ("none voluntary (full) lazy", the chosen
mode in parentheses) is recalled from memory.
"""
from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from livedyn import readiness as rd

LIVEDYN = Path(sys.executable).with_name("livedyn")
ITEMS = ["real-time priority", "locked memory", "CPU frequency governor", "kernel preemption",
         "swap in use", "sound device free"]
MEASURED = ["real-time thread", "wake-up lateness", "smallest safe block size"]


def _have_wakeup():
    lib, why = rd.build_wakeup()
    return lib


def test_table_prints_every_item_on_this_machine(tmp_path):
    r = subprocess.run([str(LIVEDYN), "ready", "--seconds", "0.1", "--json",
                        str(tmp_path / "r.json")], capture_output=True, text=True, timeout=120)
    print(r.stdout)
    rep = json.loads((tmp_path / "r.json").read_text())
    assert r.returncode == (1 if rep["verdict"] == "FAIL" else 0), r.stderr
    lines = r.stdout.splitlines()
    assert lines[0].startswith("livedyn ready: 64 frames at 48000 Hz")
    names = ITEMS + (MEASURED if _have_wakeup() else ["wake-up lateness"])
    for name in names:
        row = [ln for ln in lines if f"  {name}  " in ln]
        assert len(row) == 1, name
        assert row[0].split()[0] in ("OK", "WARN", "FAIL")
    if _have_wakeup():  # a row per block size of the measurement, 16 to 1024
        rows = [ln.split() for ln in lines if ln.strip() and ln.split()[0].isdigit()]
        assert [int(x[0]) for x in rows] == [16, 32, 64, 128, 256, 512, 1024]
    assert lines[-2].startswith("verdict: ") or lines[-1].startswith("report written")


def test_json_is_well_formed_with_every_item():
    r = subprocess.run([str(LIVEDYN), "ready", "--seconds", "0.1", "--blocksize", "128",
                        "--samplerate", "44100", "--json", "-"], capture_output=True, text=True,
                       timeout=120)
    rep = json.loads(r.stdout)  # JSON only on stdout
    assert rep["blocksize"] == 128 and rep["samplerate"] == 44100
    names = [i["name"] for i in rep["items"]]
    assert names[:6] == ITEMS
    for i in rep["items"]:
        assert set(i) == {"name", "status", "figure", "hint"}
        assert i["status"] in ("OK", "WARN", "FAIL") and i["figure"] and i["hint"]
        assert "\n" not in i["hint"] and "\n" not in i["figure"]
    order = {"OK": 0, "WARN": 1, "FAIL": 2}
    assert rep["verdict"] == max((i["status"] for i in rep["items"]), key=order.get)
    if rep["wakeup"]["rows"]:
        assert names[6:] == MEASURED
        assert [w["blocksize"] for w in rep["wakeup"]["rows"]] == [16, 32, 64, 128, 256, 512,
                                                                   1024]


@pytest.mark.parametrize("args, word", [(["--seconds", "0"], "--seconds 0"),
                                        (["--seconds", "61"], "--seconds 61"),
                                        (["--blocksize", "8"], "--blocksize 8"),
                                        (["--samplerate", "1000"], "--samplerate 1000")])
def test_bad_options_are_one_line_with_exit_2(args, word, capsys):
    from livedyn.cli import main

    assert main(["ready"] + args) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and word in err[0] and "expected" in err[0]


def test_wakeup_measurement_gives_plausible_numbers():
    lib = _have_wakeup()
    if lib is None:
        pytest.skip("no C compiler")
    r = rd.measure_wakeup(48000, 64, 1.0, lib=lib)
    print(f"\n{r}")
    expected = 48000 / 64  # wake-ups in one second
    assert abs(r["wakeups"] - expected) <= 1 and r["expected"] == expected
    # clock_nanosleep(TIMER_ABSTIME) never returns before its deadline
    assert 0 <= r["min"] <= r["p99"] <= r["p99_9"] <= r["max"]
    assert r["within_half"] == (r["max"] < 0.5)
    assert r["period_ms"] == pytest.approx(64 / 48.0, abs=1e-6)
    if rd._realtime_allowed():  # root, or an rtprio limit: the policy was granted
        assert r["policy"] == "SCHED_FIFO" and r["priority"] == rd._priority()
        assert r["realtime_error"] == ""
    else:  # asked for anyway, and refused by the system
        assert r["policy"] == "SCHED_OTHER" and r["realtime_error"]


def test_wakeup_library_is_built_once_into_the_cache(tmp_path):
    import shutil

    if shutil.which("cc") is None:
        pytest.skip("no C compiler")
    lib, why = rd.build_wakeup(cache=tmp_path / "c")
    assert lib is not None, why
    assert lib.parent == tmp_path / "c" and lib.name.startswith("wakeup-")
    t = lib.stat().st_mtime_ns
    again, _ = rd.build_wakeup(cache=tmp_path / "c")
    assert again == lib and lib.stat().st_mtime_ns == t
    assert [p.name for p in (tmp_path / "c").iterdir()] == [lib.name]  # no temp left


def test_smallest_safe_block_size_needs_every_larger_one_safe():
    rows = [{"blocksize": b, "within_half": ok} for b, ok in
            [(16, True), (32, False), (64, True), (128, True), (256, True)]]
    assert rd.smallest_safe(rows) == 64  # 16 passed by luck: 32 did not
    assert rd.smallest_safe([{"blocksize": 64, "within_half": False}]) is None
    items = rd.wakeup_items([dict(r, period_ms=r["blocksize"] / 48, p99=0.1, p99_9=0.2,
                                  max=0.3 if r["within_half"] else 0.7, policy="SCHED_FIFO",
                                  priority=10, realtime_error="") for r in rows], 32)
    st = {i.name: (i.status, i.figure) for i in items}
    # at 32 frames the maximum (0.7) passed half a period but the 99.9th percentile did not
    assert st["wake-up lateness"][0] == "WARN"
    assert st["real-time thread"][0] == "OK"
    assert st["smallest safe block size"][0] == "WARN" and "64 frames" in st[
        "smallest safe block size"][1]


def test_preemption_model_from_each_source():
    f = rd.preemption_model
    assert f(version="#1 SMP PREEMPT_RT", realtime_flag="", debug_preempt="",
             cmdline="")[0] == "PREEMPT_RT"
    assert f(version="#1 SMP", realtime_flag="1\n", debug_preempt="", cmdline="")[0] == \
        "PREEMPT_RT"
    assert f(version="#1 SMP PREEMPT_DYNAMIC", realtime_flag="",
             debug_preempt="none voluntary (full) lazy\n", cmdline="") == \
        ("full", "/sys/kernel/debug/sched/preempt")
    assert f(version="#1 SMP PREEMPT_DYNAMIC", realtime_flag="", debug_preempt="",
             cmdline="root=/dev/vda preempt=voluntary") == ("voluntary", "/proc/cmdline")
    assert f(version="#1 SMP PREEMPT_DYNAMIC", realtime_flag="", debug_preempt="",
             cmdline="")[0].startswith("dynamic")
    assert f(version="#1 SMP PREEMPT Tue", realtime_flag="", debug_preempt="",
             cmdline="")[0] == "full"
    assert f(version="#1 SMP Debian", realtime_flag="", debug_preempt="",
             cmdline="")[0] == "voluntary or none"
    assert rd.check_preemption(version="#1 SMP", realtime_flag="", debug_preempt="",
                               cmdline="preempt=none").status == "WARN"
    assert rd.check_preemption(version="#1 SMP PREEMPT_RT", realtime_flag="", debug_preempt="",
                               cmdline="").status == "OK"


def test_swap_reading():
    assert rd.check_swap("SwapTotal: 0 kB\nSwapFree: 0 kB\n").figure == "no swap"
    i = rd.check_swap("SwapTotal: 2097152 kB\nSwapFree: 1048576 kB\n")
    assert i.status == "WARN" and i.figure.startswith("1024 MiB of 2048 MiB")
    assert rd.check_swap("SwapTotal: 2097152 kB\nSwapFree: 2097152 kB\n").status == "OK"


def test_governor_reading(tmp_path):
    assert rd.check_governor(str(tmp_path)).figure.startswith("not exposed")
    for i, g in enumerate(["performance", "powersave"]):
        d = tmp_path / f"cpu{i}" / "cpufreq"
        d.mkdir(parents=True)
        (d / "scaling_governor").write_text(g + "\n")
    i = rd.check_governor(str(tmp_path))
    assert i.status == "WARN" and "powersave on 1 CPU" in i.figure
    (tmp_path / "cpu1" / "cpufreq" / "scaling_governor").write_text("performance\n")
    assert rd.check_governor(str(tmp_path)).status == "OK"


def test_sound_device_holders_from_a_synthesised_proc(tmp_path):
    proc = tmp_path
    st = proc / "asound" / "card0" / "pcm0p" / "sub0"
    st.mkdir(parents=True)
    (st / "status").write_text("state: RUNNING\nowner_pid   : 4242\n")
    (proc / "asound" / "cards").write_text(" 0 [PCH            ]: HDA-Intel - HDA Intel PCH\n")
    for pid, name, target in ((4242, "soundsrv", "/dev/snd/pcmC0D0p"),
                              (77, "mixer", "/dev/snd/controlC0"),  # a mixer: not a holder
                              (os.getpid(), "me", "/dev/snd/pcmC0D0c")):  # ourselves: skipped
        (proc / str(pid) / "fd").mkdir(parents=True)
        (proc / str(pid) / "comm").write_text(name + "\n")
        os.symlink(target, proc / str(pid) / "fd" / "5")
    holders, unreadable = rd.sound_holders(str(proc))
    assert unreadable == 0
    assert holders == [(4242, "soundsrv", "/dev/snd/pcmC0D0p"),
                       (4242, "soundsrv", "card0/pcm0p/sub0")]
    i = rd.check_sound_device(str(proc))
    assert i.status == "WARN" and "soundsrv (pid 4242" in i.figure


def test_limits_items_say_how_to_raise_them():
    for item in (rd.check_rtprio(), rd.check_memlock()):
        assert item.status in ("OK", "WARN", "FAIL")
        if item.status != "OK":
            assert "/etc/security/limits.d/" in item.hint and "audio group" in item.hint
            assert "distribution" in item.hint


def test_other_systems_are_refused_in_one_line(monkeypatch):
    monkeypatch.setattr(rd.sys, "platform", "darwin")
    with pytest.raises(rd.ReadinessError, match="Linux systems only .this is darwin"):
        rd.check(seconds=0.1)
