"""Can this machine run a live stream at the chosen block size? ``livedyn ready``.

Each item is read from the system, never changed: the real-time priority and locked-memory
limits (getrlimit(2)), the CPU frequency governor, the kernel's preemption model, swap in use,
whether another program holds a sound device, and a measurement: a native thread with a
real-time policy woken every period (``clock_nanosleep`` to absolute deadlines, see
``native/wakeup.c``), whose wake-up lateness is reported as a share of the period for a list of
block sizes. A block that wakes more than half a period late leaves the callback less than half
its time (common practice, no source).

Every item is OK, WARN or FAIL with a figure and a one-line hint. The hints give the usual
Linux way (pam_limits' files and the audio group, limits.conf(5)); a distribution's own
documentation comes first.

References
----------
getrlimit(2), limits.conf(5), sched(7), clock_nanosleep(2), proc(5), the kernel's cpufreq
documentation (``Documentation/admin-guide/pm/cpufreq.rst``).
"""
from __future__ import annotations

import glob
import hashlib
import json
import os
import shutil
import subprocess
import sys
from dataclasses import asdict, dataclass
from pathlib import Path

from .engine import realtime as rt

OK, WARN, FAIL = "OK", "WARN", "FAIL"
BLOCKSIZES = (16, 32, 64, 128, 256, 512, 1024)
WAKE_PRIORITY = 10  # jackd's default priority, as its start-up line prints on this machine
LIVE_MAPPED = 640 * 2**20  # VmSize of a live run, measured here: 614 MiB (x86_64 Linux)
LIMITS_HINT = ("as root, put a file in /etc/security/limits.d/ with '@audio - rtprio 95' and "
               "'@audio - memlock unlimited', add yourself to the audio group, log in again "
               "(limits.conf(5); your distribution's documentation may name another way)")


class ReadinessError(ValueError):
    """A bad option (one line for the user)."""


@dataclass
class Item:
    name: str
    status: str
    figure: str
    hint: str


def _read(path):
    try:
        with open(path) as f:
            return f.read()
    except OSError:
        return None


# ---- limits ---------------------------------------------------------------------------------

def _limit_text(v):
    import resource

    return "unlimited" if v == resource.RLIM_INFINITY else str(v)


def check_rtprio():
    """The real-time priority limit (RLIMIT_RTPRIO), or CAP_SYS_NICE that overrides it."""
    import resource

    soft, hard = resource.getrlimit(resource.RLIMIT_RTPRIO)
    fig = f"rtprio limit {_limit_text(soft)} (hard {_limit_text(hard)})"
    if rt.has_capability(rt.CAP_SYS_NICE):
        return Item("real-time priority", OK, fig + "; CAP_SYS_NICE held (root): any priority",
                    "nothing to do")
    if soft == resource.RLIM_INFINITY or soft >= 20:
        return Item("real-time priority", OK, fig, "nothing to do")
    if soft > 0:
        return Item("real-time priority", WARN, fig + ": below the JACK server's 10 + headroom",
                    "raise rtprio: " + LIMITS_HINT)
    return Item("real-time priority", FAIL, fig + ": real-time scheduling will be refused",
                "allow rtprio: " + LIMITS_HINT)


def check_memlock():
    """The locked-memory limit (RLIMIT_MEMLOCK), or CAP_IPC_LOCK that overrides it."""
    import resource

    soft, hard = resource.getrlimit(resource.RLIMIT_MEMLOCK)
    fig = f"memlock limit {_limit_text(soft) if soft == resource.RLIM_INFINITY else rt._mib(soft)}"
    cap = rt.has_capability(rt.CAP_IPC_LOCK)
    ok, _ = rt.lock_decision(soft, LIVE_MAPPED, cap)
    if cap:
        return Item("locked memory", OK, fig + "; CAP_IPC_LOCK held (root): no limit",
                    "nothing to do")
    if ok:
        return Item("locked memory", OK, fig, "nothing to do")
    return Item("locked memory", WARN,
                fig + f": a live run (about {rt._mib(LIVE_MAPPED)}) cannot be locked",
                "raise memlock: " + LIMITS_HINT)


# ---- CPU, kernel, memory ----------------------------------------------------------------------

def check_governor(root="/sys/devices/system/cpu"):
    """The cpufreq scaling governor of every CPU that exposes one."""
    govs = {}
    for path in sorted(glob.glob(os.path.join(root, "cpu[0-9]*/cpufreq/scaling_governor"))):
        g = (_read(path) or "").strip()
        if g:
            govs.setdefault(g, 0)
            govs[g] += 1
    if not govs:
        return Item("CPU frequency governor", OK, "not exposed (no cpufreq in /sys)",
                    "nothing to set: a virtual machine or a fixed clock")
    fig = ", ".join(f"{g} on {n} CPU{'s' if n > 1 else ''}" for g, n in sorted(govs.items()))
    if set(govs) == {"performance"}:
        return Item("CPU frequency governor", OK, fig, "nothing to do")
    return Item("CPU frequency governor", WARN, fig + ": the clock may ramp up late",
                "for the show, choose the performance governor (as root: cpupower "
                "frequency-set -g performance, or your distribution's power settings)")


def preemption_model(version=None, realtime_flag=None, debug_preempt=None, cmdline=None):
    """(model, how it was found) from /sys/kernel/realtime, uname -v,
    /sys/kernel/debug/sched/preempt and /proc/cmdline (arguments override for tests)."""
    version = os.uname().version if version is None else version
    realtime_flag = _read("/sys/kernel/realtime") if realtime_flag is None else realtime_flag
    debug_preempt = _read("/sys/kernel/debug/sched/preempt") if debug_preempt is None \
        else debug_preempt
    cmdline = (_read("/proc/cmdline") or "") if cmdline is None else cmdline
    if (realtime_flag or "").strip() == "1":
        return "PREEMPT_RT", "/sys/kernel/realtime"
    if "PREEMPT_RT" in version:
        return "PREEMPT_RT", "uname -v"
    if debug_preempt:
        for word in debug_preempt.split():
            if word.startswith("(") and word.endswith(")"):
                return word.strip("()"), "/sys/kernel/debug/sched/preempt"
    for arg in cmdline.split():
        if arg.startswith("preempt="):
            return arg.split("=", 1)[1], "/proc/cmdline"
    if "PREEMPT_DYNAMIC" in version:
        return "dynamic (mode not readable)", "uname -v"
    if "PREEMPT" in version.split():
        return "full", "uname -v"
    return "voluntary or none", "uname -v"


def check_preemption(**kw):
    model, how = preemption_model(**kw)
    fig = f"{model} ({how})"
    if model in ("PREEMPT_RT", "full", "lazy", "rt"):
        return Item("kernel preemption", OK, fig, "nothing to do")
    hint = ("boot with preempt=full (a PREEMPT_DYNAMIC kernel) or use your distribution's "
            "low-latency or real-time kernel")
    if model.startswith("dynamic"):
        hint = "read it as root from /sys/kernel/debug/sched/preempt; " + hint
    return Item("kernel preemption", WARN, fig, hint)


def check_swap(meminfo=None):
    text = _read("/proc/meminfo") if meminfo is None else meminfo
    vals = {}
    for line in (text or "").splitlines():
        parts = line.split()
        if len(parts) >= 2 and parts[0] in ("SwapTotal:", "SwapFree:"):
            vals[parts[0][:-1]] = int(parts[1]) * 1024
    if "SwapTotal" not in vals:
        return Item("swap in use", OK, "not readable (/proc/meminfo)", "nothing to do")
    total, used = vals["SwapTotal"], vals["SwapTotal"] - vals.get("SwapFree", 0)
    if total == 0:
        return Item("swap in use", OK, "no swap", "nothing to do")
    if used == 0:
        return Item("swap in use", OK, f"0 of {rt._mib(total)}", "nothing to do")
    return Item("swap in use", WARN, f"{rt._mib(used)} of {rt._mib(total)} swapped out",
                "a page the stream needs may be on disk: allow locked memory (memlock) or "
                "free memory before the show")


# ---- sound devices ----------------------------------------------------------------------------

def sound_holders(proc="/proc"):
    """([(pid, program, device)], unreadable process count): processes other than this one
    holding a PCM device open, from ALSA's substream status files (owner_pid) and a scan of
    every process's open files for /dev/snd/pcm*."""
    me = os.getpid()
    found = {}
    for st in glob.glob(os.path.join(proc, "asound/card*/pcm*/sub*/status")):
        text = _read(st) or ""
        for line in text.splitlines():
            if line.strip().startswith("owner_pid"):
                try:
                    pid = int(line.split(":", 1)[1])
                except ValueError:
                    continue
                if pid != me:
                    card = st.split("/asound/", 1)[1].rsplit("/", 1)[0]
                    found[(pid, card)] = None
    unreadable = 0
    for d in glob.glob(os.path.join(proc, "[0-9]*")):
        try:
            pid = int(os.path.basename(d))
        except ValueError:
            continue
        if pid == me:
            continue
        try:
            fds = os.listdir(os.path.join(d, "fd"))
        except OSError:
            unreadable += 1
            continue
        for fd in fds:
            try:
                target = os.readlink(os.path.join(d, "fd", fd))
            except OSError:
                continue
            if target.startswith("/dev/snd/pcm"):
                found[(pid, target)] = None
    out = []
    for pid, dev in sorted(found):
        name = (_read(os.path.join(proc, str(pid), "comm")) or "?").strip()
        out.append((pid, name, dev))
    return out, unreadable


def check_sound_device(proc="/proc"):
    cards = _read(os.path.join(proc, "asound/cards"))
    holders, unreadable = sound_holders(proc)
    if cards is None and not os.path.isdir("/dev/snd"):
        return Item("sound device free", OK, "no sound cards (/proc/asound and /dev/snd absent)",
                    "nothing to do: 'livedyn run --headless' needs no card")
    ncards = sum(1 for line in (cards or "").splitlines() if line[:3].strip().isdigit())
    note = f"; {unreadable} processes not readable" if unreadable else ""
    if not holders:
        return Item("sound device free", OK, f"{ncards} card(s), none held{note}",
                    "nothing to do")
    who = ", ".join(f"{n} (pid {p}, {d})" for p, n, d in holders[:3])
    return Item("sound device free", WARN, f"held by {who}{note}",
                "another program has the card: play through it (its JACK or ALSA device) or "
                "stop it for the show")


# ---- the wake-up measurement ------------------------------------------------------------------

def _cache_dir():
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "livedyn"


def build_wakeup(cache=None):
    """Compile ``native/wakeup.c`` with the system C compiler once (by content hash) into the
    user's cache folder; returns ``(path, None)`` or ``(None, reason)``."""
    src = Path(__file__).with_name("native") / "wakeup.c"
    code = src.read_bytes()
    tag = hashlib.sha256(code).hexdigest()[:12]
    cache = Path(cache) if cache else _cache_dir()
    lib = cache / f"wakeup-{tag}.so"
    if lib.exists():
        return lib, None
    cc = os.environ.get("CC") or shutil.which("cc") or shutil.which("gcc")
    if not cc:
        return None, "no C compiler (cc) found: install gcc to measure"
    try:
        cache.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        return None, f"cannot create {cache}: {e.strerror}"
    tmp = cache / f".wakeup-{tag}-{os.getpid()}.so"
    try:
        r = subprocess.run([cc, "-O2", "-shared", "-fPIC", "-pthread", str(src), "-o", str(tmp)],
                           capture_output=True, text=True, timeout=60)
    except (OSError, subprocess.TimeoutExpired) as e:
        return None, f"{cc} failed: {e}"
    if r.returncode != 0:
        tmp.unlink(missing_ok=True)
        return None, f"{cc} failed: {(r.stderr or r.stdout).strip().splitlines()[:1]}"
    os.replace(tmp, lib)
    return lib, None


def _priority():
    """The priority the measuring thread asks for: WAKE_PRIORITY, lowered to a smaller rtprio
    limit but never below 1, so that a limit of 0 is tried and refused by the system itself."""
    import resource

    if rt.has_capability(rt.CAP_SYS_NICE):
        return WAKE_PRIORITY
    soft = resource.getrlimit(resource.RLIMIT_RTPRIO)[0]
    if soft == resource.RLIM_INFINITY:
        return WAKE_PRIORITY
    return int(max(1, min(WAKE_PRIORITY, soft)))


def _realtime_allowed():
    """Whether the system should grant the measuring thread its priority (CAP_SYS_NICE, or an
    rtprio limit of at least 1; sched(7))."""
    import resource

    soft = resource.getrlimit(resource.RLIMIT_RTPRIO)[0]
    return rt.has_capability(rt.CAP_SYS_NICE) or soft == resource.RLIM_INFINITY or soft >= 1


def measure_wakeup(samplerate=48000, blocksize=64, seconds=1.0, lib=None, priority=None):
    """Wake a native thread every ``blocksize / samplerate`` seconds for ``seconds``.

    Returns a dict: ``blocksize``, ``period_ms``, ``expected`` and ``wakeups`` (counts),
    ``policy`` and ``priority`` the thread ran with, and the lateness ``p99``, ``p99_9`` and
    ``max`` as shares of the period (``within_half``: max below 0.5).
    """
    import ctypes

    import numpy as np

    if lib is None:
        lib, why = build_wakeup()
        if lib is None:
            raise RuntimeError(why)
    dll = ctypes.CDLL(str(lib))
    fn = dll.ld_wakeup
    fn.restype = ctypes.c_int
    fn.argtypes = [ctypes.c_int64, ctypes.c_int64, ctypes.c_int, ctypes.c_void_p,
                   ctypes.c_int64, ctypes.c_void_p]
    period_ns = int(round(1e9 * blocksize / samplerate))
    duration_ns = int(round(1e9 * seconds))
    cap = duration_ns // period_ns + 2
    late = np.zeros(cap, np.int64)
    out = np.zeros(4, np.int64)
    prio = _priority() if priority is None else int(priority)
    err = fn(period_ns, duration_ns, prio, late.ctypes.data, cap, out.ctypes.data)
    if err != 0:
        raise RuntimeError(f"could not start the measuring thread ({os.strerror(err)})")
    n = int(out[0])
    lat = late[:n].astype(np.float64) / period_ns
    return {"blocksize": int(blocksize), "period_ms": period_ns / 1e6,
            "expected": seconds * samplerate / blocksize, "wakeups": n,
            "policy": rt.POLICY_NAMES.get(int(out[1]), str(int(out[1]))),
            "priority": int(out[2]), "realtime_error": os.strerror(int(out[3])) if out[3] else "",
            "min": float(lat.min()) if n else 0.0,
            "p99": float(np.percentile(lat, 99)) if n else 0.0,
            "p99_9": float(np.percentile(lat, 99.9)) if n else 0.0,
            "max": float(lat.max()) if n else 0.0,
            "within_half": bool(n and lat.max() < 0.5)}


def smallest_safe(rows):
    """The smallest measured block size from which every larger one measured also kept every
    wake-up within half a period, or None."""
    best = None
    for r in sorted(rows, key=lambda r: -r["blocksize"]):
        if not r["within_half"]:
            break
        best = r["blocksize"]
    return best


def wakeup_items(rows, blocksize):
    """Items from the measurement rows: the chosen block size, the smallest safe one, and
    whether the measuring thread got a real-time policy."""
    items = []
    first = rows[0]
    if first["policy"] in rt.REALTIME_POLICIES:
        items.append(Item("real-time thread", OK, f"{first['policy']} priority "
                          f"{first['priority']} granted", "nothing to do"))
    else:
        why = f" ({first['realtime_error']})" if first["realtime_error"] else ""
        items.append(Item("real-time thread", FAIL, f"refused{why}: measured with "
                          f"{first['policy']}", "allow rtprio: " + LIMITS_HINT))
    mine = next(r for r in rows if r["blocksize"] == blocksize)
    fig = (f"{blocksize} frames ({mine['period_ms']:.2f} ms): late p99 {mine['p99']:.2f}, "
           f"p99.9 {mine['p99_9']:.2f}, max {mine['max']:.2f} of the period")
    if mine["within_half"]:
        items.append(Item("wake-up lateness", OK, fig, "nothing to do"))
    elif mine["p99_9"] < 0.5:
        items.append(Item("wake-up lateness", WARN, fig + ": rare wake-ups past half a period",
                          "expect an occasional late block: a larger block size, or fewer "
                          "programs running"))
    else:
        items.append(Item("wake-up lateness", FAIL, fig + ": often past half a period",
                          "use a larger block size (see the smallest safe one) or a quieter "
                          "machine"))
    safe = smallest_safe(rows)
    if safe is None:
        items.append(Item("smallest safe block size", FAIL,
                          f"none up to {rows[-1]['blocksize']} frames",
                          "this machine wakes too late for live use: check the items above"))
    else:
        s = safe
        st = OK if s <= blocksize else WARN
        items.append(Item("smallest safe block size", st,
                          f"{s} frames ({mine['period_ms'] * s / blocksize:.2f} ms)",
                          "nothing to do" if st == OK else
                          f"run with --blocksize {s} or larger"))
    return items


# ---- the whole check --------------------------------------------------------------------------

def check(samplerate=48000, blocksize=64, seconds=2.0, sizes=BLOCKSIZES, out=None):
    """Run every item; returns the report dict (``items``, ``wakeup``, ``verdict``).

    ``out``, if given, is called with a line of progress while the measurement runs.
    """
    if not sys.platform.startswith("linux"):
        raise ReadinessError(f"livedyn ready checks Linux systems only (this is {sys.platform})")
    if not 8000 <= samplerate <= 384000:
        raise ReadinessError(f"--samplerate {samplerate:g}: expected 8000 to 384000 Hz")
    if not 16 <= blocksize <= 8192:
        raise ReadinessError(f"--blocksize {blocksize}: expected 16 to 8192 frames")
    if not 0 < seconds <= 60:
        raise ReadinessError(f"--seconds {seconds:g}: expected more than 0 and at most 60 "
                             "(per block size)")
    items = [check_rtprio(), check_memlock(), check_governor(), check_preemption(),
             check_swap(), check_sound_device()]
    sizes = sorted(set(int(s) for s in sizes) | {int(blocksize)})
    wake = {"samplerate": samplerate, "seconds_per_size": seconds, "rows": [],
            "method": "native thread, clock_nanosleep(TIMER_ABSTIME) every period"}
    lib, why = build_wakeup()
    if lib is None:
        items.append(Item("wake-up lateness", WARN, f"not measured: {why}",
                          "install a C compiler (gcc) and run again"))
        wake["error"] = why
    else:
        for s in sizes:
            if out is not None:
                out(f"measuring {s} frames for {seconds:g} s ...")
            wake["rows"].append(measure_wakeup(samplerate, s, seconds, lib=lib))
        wake["smallest_safe_blocksize"] = smallest_safe(wake["rows"])
        items += wakeup_items(wake["rows"], blocksize)
    order = {OK: 0, WARN: 1, FAIL: 2}
    verdict = max((i.status for i in items), key=order.get)
    return {"samplerate": samplerate, "blocksize": blocksize, "verdict": verdict,
            "items": [asdict(i) for i in items], "wakeup": wake,
            "platform": {"system": sys.platform, "kernel": os.uname().release,
                         "version": os.uname().version}}


def format_report(rep):
    """The report as a table: one line per item, its hint below it unless nothing is to do."""
    lines = [f"livedyn ready: {rep['blocksize']} frames at {rep['samplerate']:g} Hz "
             f"({1000 * rep['blocksize'] / rep['samplerate']:.2f} ms) on this machine"]
    w = max(len(i["name"]) for i in rep["items"])
    for i in rep["items"]:
        lines.append(f"  {i['status']:<4}  {i['name']:<{w}}  {i['figure']}")
        if i["status"] != OK:
            lines.append(f"  {'':<4}  {'':<{w}}  fix: {i['hint']}")
    rows = rep["wakeup"]["rows"]
    if rows:
        r0 = rows[0]
        lines.append(f"wake-up lateness, share of the period ({r0['policy']} priority "
                     f"{r0['priority']}, {rep['wakeup']['seconds_per_size']:g} s per size):")
        lines.append(f"  {'frames':>6} {'period ms':>9} {'wake-ups':>8} {'p99':>6} "
                     f"{'p99.9':>6} {'max':>6}  within half")
        for r in rows:
            lines.append(f"  {r['blocksize']:>6} {r['period_ms']:>9.3f} {r['wakeups']:>8} "
                         f"{r['p99']:>6.3f} {r['p99_9']:>6.3f} {r['max']:>6.3f}  "
                         f"{'yes' if r['within_half'] else 'no'}")
    lines.append(f"verdict: {rep['verdict']}")
    return "\n".join(lines)


def to_json(rep):
    return json.dumps(rep, indent=2) + "\n"
