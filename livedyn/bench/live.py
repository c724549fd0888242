"""Live-stream measurements: callback cost and headroom, and round-trip latency.

``run_stream``: a real stream (a device, or a headless JACK server of its own) runs for N seconds
with K instances of an algorithm; the callback's own elapsed times and wake-up intervals come
back as shares of the block period, with late and flagged blocks, memory growth and the
latencies the stream reports. ``--load python-thread`` / ``--load compile`` add interpreter load
in the same process to show that the native callback does not depend on it.

``run_latency``: a maximum-length sequence (scipy.signal.max_len_seq) played through the stream
and heard back through a loopback (the headless server's ports patched output to input; on
hardware, a cable the user connects), cross-correlated to give the delay in samples, reported
beside what the stream claims and the processor's own latency from an impulse.
"""
from __future__ import annotations

import json
import math
import os
import threading
import time

import numpy as np


def _rss_kib():
    try:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("VmRSS:"):
                    return int(line.split()[1])
    except OSError:
        pass
    return 0


class _Load:
    """Interpreter load in this process: a busy Python thread, or numba compilations."""

    def __init__(self, kind):
        self.kind = kind
        self.stop = threading.Event()
        self.count = 0
        self.thread = threading.Thread(target=self._run, daemon=True)

    def _run(self):
        if self.kind == "python-thread":
            x = 0
            while not self.stop.is_set():
                for i in range(10000):
                    x += i * i
                self.count += 1
        elif self.kind == "compile":
            import numba

            while not self.stop.is_set():
                src = f"def f_{self.count}(a):\n    return a * {self.count + 1} + 1\n"
                ns = {}
                exec(src, ns)
                numba.njit(ns[f"f_{self.count}"])(1.0)
                self.count += 1

    def __enter__(self):
        if self.kind:
            self.thread.start()
        return self

    def __exit__(self, *exc):
        self.stop.set()
        if self.kind:
            self.thread.join(timeout=5)


def _processor(algorithm, fs, channels, key_channels, settings):
    from livedyn.processor import Processor
    from livedyn import loader

    p = Processor(loader.get(algorithm), fs, channels, key_channels=key_channels)
    for k, v in settings.items():
        p.set(k, v)
    return p


def _start_server(headless, samplerate, blocksize, realtime, device):
    """(server, device): a headless JACK server of the run's own and its device name, or no
    server and the device given."""
    if not headless:
        return None, device
    from livedyn.engine import stream as st
    from livedyn.engine.jackserver import JackServer

    server = JackServer(samplerate, blocksize, realtime=realtime).start()
    st.reinitialise()
    return server, "system"


def _sources(samplerate, channels, key_channels):
    """4 s of seeded noise in 0.1 s steps of level, looped, as main source (and its first
    channel as the key when the processor takes one)."""
    from livedyn.engine.engine import ArraySource

    rng = np.random.default_rng(1)
    n = int(samplerate * 4)
    sig = (0.3 * rng.standard_normal((n, channels)) *
           np.repeat(rng.uniform(0.05, 1.0, n // 4800 + 1), 4800)[:n, None])
    key = ArraySource(sig[:, :1], loop=True) if key_channels else None
    return dict(main_source=ArraySource(sig, loop=True), key_source=key)


def _engine(proc, samplerate, channels, key_channels, blocksize, device, instances=1,
            realtime=True):
    """An Engine playing :func:`_sources`."""
    from livedyn.engine.engine import Engine

    return Engine(proc, blocksize, device=device, instances=instances, meters=False,
                  realtime=realtime, **_sources(samplerate, channels, key_channels))


DEFAULT_SETTINGS = {"compressor": {"key_hpf": 100.0, "lookahead": 5.0}}


def run_stream(seconds=10.0, algorithm="compressor", instances=1, samplerate=48000,
               blocksize=64, channels=2, load=None, headless=True, device=None, realtime=True,
               settings=None, out=print):
    """One measured run; returns a dict of figures (shares of the block period)."""
    from livedyn import loader
    from livedyn.engine.session import LiveSession

    settings = DEFAULT_SETTINGS.get(algorithm, {}) if settings is None else settings
    kch = 1 if loader.get(algorithm).needs_key else 0
    proc = _processor(algorithm, samplerate, channels, kch, settings)
    session = LiveSession(proc, blocksize, headless=headless, realtime=realtime,
                          exit_on_failure=False, out=None, device=device, instances=instances,
                          meters=False, **_sources(samplerate, channels, kch))
    rss0 = _rss_kib()
    with _Load(load) as ld:
        session.open()
        try:
            session.run_status_lines(seconds)  # until the time is up, a signal or a failure
        finally:
            snap = session.close()
    eng, server = session.engine, session.server
    if session.failure:
        raise RuntimeError(f"bench stream: {session.failure}")
    nb = min(snap["blocks"], len(eng.elring))
    from livedyn.engine.callback import S_PERIOD_NS

    shares = eng.elring[:nb, 0] / float(eng.stats[S_PERIOD_NS])
    rss1 = _rss_kib()
    res = {
        "algorithm": algorithm, "instances": instances, "samplerate": samplerate,
        "blocksize": blocksize, "channels": channels, "seconds": seconds, "load": load,
        "load_iterations": ld.count, "settings": settings,
        "blocks": snap["blocks"], "late_blocks": snap["late_blocks"],
        "flagged_blocks": snap["flagged_blocks"], "status_flags": snap["status_flags"],
        "callback_load": snap["callback_load"], "wakeup_interval": snap["wakeup_interval"],
        "memory_growth_kib": rss1 - rss0,
        "stream_latency_s": snap.get("stream_latency_s"),
        "realtime_granted": bool(server.realtime_granted) if server else None,
        "realtime_threads": snap.get("realtime_threads"),
        "realtime": snap.get("realtime"),
        "callback_shares": shares,  # per block; not written to JSON
    }
    if out:
        out(format_stream(res))
    return res


def format_stream(r):
    c, w = r["callback_load"], r["wakeup_interval"]
    return (f"{r['algorithm']} x{r['instances']} {r['channels']} ch {r['samplerate']} Hz block "
            f"{r['blocksize']}, {r['seconds']:g} s, load={r['load'] or 'none'}: callback "
            f"median {100 * c['median']:.2f} %, 99th {100 * c['p99']:.2f} %, 99.9th "
            f"{100 * c['p99_9']:.2f} %, max {100 * c['max']:.1f} % of the period; wake-up "
            f"interval median {w['median']:.3f}, 99.9th {w['p99_9']:.3f}, max {w['max']:.2f} "
            f"periods; late {r['late_blocks']}, flagged {r['flagged_blocks']} of {r['blocks']} "
            f"blocks; memory +{r['memory_growth_kib']} KiB; real time "
            f"{'granted' if r['realtime_granted'] else 'not granted'}")


def find_max(limit_share=0.7, seconds=5.0, out=print, **kw):
    """Raise the instance count until blocks are late/flagged or the 99.9th percentile of the
    callback time passes ``limit_share`` of the period; the largest safe count."""
    k, best, rows = 1, 0, []
    while k <= 4096:
        r = run_stream(seconds=seconds, instances=k, out=out, **kw)
        rows.append(r)
        ok = r["late_blocks"] == 0 and r["flagged_blocks"] == 0 and \
            r["callback_load"]["p99_9"] <= limit_share
        if not ok:
            break
        best = k
        k *= 2
    return best, rows


# ---- live swap ------------------------------------------------------------------------------

def run_swap(swaps=10, algorithm="compressor", samplerate=48000, blocksize=64, channels=2,
             interval=0.3, headless=True, device=None, realtime=True, out=print):
    """``swaps`` live swaps of an algorithm to a fresh instance of itself while it streams.

    A swap's blocks run both versions (and the crossfade), so they cost about twice a normal
    block; this reports the callback's own time in those blocks beside the others', as shares
    of the period and as their ratio, with late and flagged blocks in and out of the swap
    windows and the control side's prime and switch times. One run, one machine: a ratio is
    the figure to quote, with the load average."""
    from livedyn import loader
    from livedyn.engine import callback as cb
    from livedyn.engine import stream as st

    if int(swaps) < 1:
        raise ValueError(f"swaps {swaps!r}: expected a whole number of at least 1")
    alg = loader.get(algorithm)
    load0 = os.getloadavg()
    server, device = _start_server(headless, samplerate, blocksize, realtime, device)
    try:
        kch = 1 if alg.needs_key else 0
        proc = _processor(alg, samplerate, channels, kch,
                          DEFAULT_SETTINGS.get(algorithm, {}) if isinstance(algorithm, str)
                          else {})
        eng = _engine(proc, samplerate, channels, kch, blocksize, device, realtime=realtime)
        infos = []
        eng.start()
        try:
            time.sleep(max(interval, 0.6))  # past the fade-in and the first blocks
            for _ in range(int(swaps)):
                infos.append(eng.swap(alg))
                time.sleep(interval)
            snap = eng.snapshot()
            stats = eng.stats.copy()
        finally:
            eng.stop()
        nb = min(int(stats[cb.S_BLOCKS]), len(eng.elring))
        ring = eng.elring[:nb].copy()
        period = float(stats[cb.S_PERIOD_NS])
    finally:
        st.terminate()
        if server is not None:
            server.stop()
    skip = min(nb, int(0.5 * samplerate / blocksize))  # start-up blocks are not the steady state
    ring = ring[skip:]
    in_swap = ((ring[:, 2] >> cb.SWAP_BIT) & 1).astype(bool)
    flagged = (ring[:, 2] & ((1 << cb.SWAP_BIT) - 1)) != 0

    def shares(el):
        el = np.asarray(el, np.float64) / period
        if not len(el):
            return {"median": None, "p99": None, "max": None}
        return {"median": float(np.median(el)), "p99": float(np.percentile(el, 99)),
                "max": float(el.max())}

    sw, other = shares(ring[in_swap, 0]), shares(ring[~in_swap, 0])
    res = {
        "algorithm": alg.name, "samplerate": samplerate, "blocksize": blocksize,
        "channels": channels, "swaps": int(stats[cb.S_SWAPS]),
        "swap_blocks": int(np.count_nonzero(in_swap)),
        "other_blocks": int(np.count_nonzero(~in_swap)),
        "swap_callback": sw, "other_callback": other,
        "median_ratio": (sw["median"] / other["median"]) if sw["median"] and other["median"]
        else None,
        "flagged_in_swaps": int(np.count_nonzero(flagged & in_swap)),
        "flagged_elsewhere": int(np.count_nonzero(flagged & ~in_swap)),
        "late_in_swaps": int(stats[cb.S_SWAP_LATE]),
        "late_blocks": snap["late_blocks"], "flagged_blocks": snap["flagged_blocks"],
        "prime_ms": float(np.median([i["prime_s"] for i in infos]) * 1e3),
        "switch_ms": float(np.median([i["switch_s"] for i in infos]) * 1e3),
        "switch_ms_max": float(max(i["switch_s"] for i in infos) * 1e3),
        "realtime_granted": bool(server.realtime_granted) if server else None,
        "load_average_before": load0, "load_average_after": os.getloadavg(),
    }
    if out:
        out(format_swap(res))
    return res


def format_swap(r):
    s, o = r["swap_callback"], r["other_callback"]
    pct = (lambda v: "n/a" if v is None else f"{100 * v:.2f} %")
    ratio = "n/a" if r["median_ratio"] is None else f"{r['median_ratio']:.2f}"
    return (f"{r['algorithm']} {r['channels']} ch {r['samplerate']} Hz block {r['blocksize']}: "
            f"{r['swaps']} swaps, {r['swap_blocks']} swap blocks, {r['other_blocks']} others; "
            f"callback median {pct(s['median'])} in swap blocks vs {pct(o['median'])} "
            f"(ratio {ratio}), 99th {pct(s['p99'])} vs {pct(o['p99'])}, max {pct(s['max'])} "
            f"vs {pct(o['max'])} of the period; flagged {r['flagged_in_swaps']} in swap "
            f"windows, {r['flagged_elsewhere']} elsewhere; late {r['late_in_swaps']} in swaps, "
            f"{r['late_blocks']} in all; prime {r['prime_ms']:.1f} ms, "
            f"switch {r['switch_ms']:.1f} ms median (max {r['switch_ms_max']:.1f}); real time "
            f"{'granted' if r['realtime_granted'] else 'not granted'}; load average "
            f"{r['load_average_before'][0]:.2f} -> {r['load_average_after'][0]:.2f}")


# ---- latency --------------------------------------------------------------------------------

def find_delay(sent, received, max_delay):
    """Delay in samples of ``received`` behind ``sent`` by cross-correlation (FFT)."""
    n = len(sent) + len(received)
    nfft = 1 << (n - 1).bit_length()
    a = np.fft.rfft(sent, nfft)
    b = np.fft.rfft(received, nfft)
    xc = np.fft.irfft(b * np.conj(a), nfft)[: max_delay + 1]
    return int(np.argmax(xc)), float(xc.max() / (np.sqrt(np.sum(sent ** 2) *
                                                         np.sum(received ** 2)) + 1e-30))


def run_latency(repeats=5, samplerate=48000, blocksize=64, headless=True, device=None,
                realtime=True, out=print):
    """Round-trip latency through a loopback, measured ``repeats`` times."""
    import scipy.signal as sps

    from livedyn.processor import Processor
    from livedyn.engine import stream as st
    from livedyn.engine.engine import ArraySource, Engine
    from livedyn.engine.jackserver import JackServer

    mls = sps.max_len_seq(14)[0].astype(np.float32) * 2 - 1  # 16383 samples of +-1
    probe = np.concatenate([np.zeros(samplerate // 2, np.float32), 0.25 * mls,
                            np.zeros(samplerate // 4, np.float32)])
    results = []
    server = None
    try:
        if headless:
            server = JackServer(samplerate, blocksize, realtime=realtime).start()
            st.reinitialise()
            device = "system"
        elif out:
            out("connect a cable from output 1 to input 2 of the device; the measurement then "
                "includes converters and driver")
        for r in range(repeats):
            rec = f"/tmp/livedyn-latency-{os.getpid()}-{r}"
            # the probe plays as the main input and leaves on output 1 (ratio 1: transparent);
            # what comes back on device input 1 is taken in as the key and recorded
            proc = Processor("compressor", samplerate, 1, key_channels=1, ratio=1,
                                     key="external")
            eng = Engine(proc, blocksize, device=device, main_source=ArraySource(probe[:, None]),
                         key_inputs=[1 if headless else 2], outputs=[1], record_dir=rec,
                         fade_in_ms=0.0, meters=False, ceiling_db=0.0)
            eng.start()
            if server is not None:
                server.loopback()
            while not eng.source_finished:
                time.sleep(0.02)
            time.sleep(0.1)
            snap = eng.snapshot()
            eng.stop()
            import soundfile as sf

            sent, _ = sf.read(f"{rec}/main.wav", dtype="float32")
            got, _ = sf.read(f"{rec}/key.wav", dtype="float32")
            d, corr = find_delay(sent, got, samplerate // 2)
            results.append({"delay_samples": d, "correlation": corr,
                            "stream_latency_s": snap.get("stream_latency_s")})
            for f in os.listdir(rec):
                os.unlink(os.path.join(rec, f))
            os.rmdir(rec)
    finally:
        st.terminate()
        if server is not None:
            server.stop()
    lat = results[0]["stream_latency_s"] or {}
    claimed = round((lat.get("input", 0.0) + lat.get("output", 0.0)) * samplerate)
    impulse = {}
    for algo, kw in (("compressor", {"lookahead": 5.0}), ("limiter", {}), ("compressor", {})):
        p = Processor(algo, samplerate, 1, **kw)
        x = np.zeros((4096, 1), np.float32)
        x[100] = 1e-3
        y = p.process(x)
        impulse[f"{algo} {kw or 'defaults'}"] = {"measured": int(np.argmax(np.abs(y))) - 100,
                                                 "reported": p.latency_samples}
    res = {"samplerate": samplerate, "blocksize": blocksize, "headless": headless,
           "round_trip_samples": [r["delay_samples"] for r in results],
           "correlation": [r["correlation"] for r in results],
           "stream_claims_samples": claimed, "processor_latency": impulse}
    if out:
        rt = res["round_trip_samples"]
        out(f"round trip through the loopback: {rt} samples over {repeats} runs "
            f"({1000 * rt[0] / samplerate:.3f} ms); the stream claims {claimed} samples "
            f"(input + output latency)")
        for k, v in impulse.items():
            out(f"processor {k}: {v['measured']} samples from an impulse, reports "
                f"{v['reported']}")
    return res


def write_json(path, obj):
    from livedyn.presets import write_text_atomic

    write_text_atomic(path, json.dumps(obj, indent=1, default=float) + "\n")


def percentile_share(times_ns, period_ns, q):
    """The q-th percentile of a series of times as a share of the period."""
    t = np.asarray(times_ns, dtype=np.float64)
    return float(np.percentile(t, q)) / period_ns if t.size else math.nan
