"""The ``livedyn`` command: thin subcommands over the library.

Every user error ends in one line ``livedyn: error: ...`` and exit code 2; nothing is
overwritten by a command that fails.
"""
from __future__ import annotations

import argparse
import json
import math
import sys
from pathlib import Path

EXIT_USAGE = 2
#: A run that played to its end but could not write all it should (disk full, ...): what was
#: written is kept and readable.
EXIT_INCOMPLETE = 4

CAUTION = ("Caution: live monitoring can be loud. Start with the monitor level down, keep "
           "microphones away from loudspeakers (feedback), and follow the venue's rules.")


class CliError(Exception):
    pass


def _user_errors():
    from .outputs import OutputError
    from .params import ParamError
    from .wavio import WavError

    # OSError: any file-system failure (missing folder, a file where a folder should be, disk
    # full, ...) is the user's to fix and gets the one-line error too.
    return (ParamError, WavError, CliError, OutputError, OSError)


def _guard(args, writes=(), folders=(), take=None):
    """Check every path the command will write against what it reads and each other
    (livedyn.outputs) before anything is opened; returns the checked Outputs."""
    from .outputs import Outputs

    g = Outputs()
    for option, attr in (("IN.wav", "input"), ("--key", "key"), ("--automation", "automation"),
                         ("--input-file", "input_file"), ("--key-file", "key_file")):
        g.read(option, getattr(args, attr, None))
    alg = getattr(args, "algorithm", None)
    if alg is not None and str(alg).endswith(".py"):
        g.read("--algorithm", alg)
    preset = getattr(args, "preset", None)
    if preset is not None:
        from . import presets

        try:
            g.read("--preset", presets._resolve(preset))
        except ValueError:
            pass  # an unknown preset is reported when it is loaded
    for option, path in writes:
        g.write(option, path)
    for option, path, names in folders:
        g.folder(option, path, names)
    if take is not None:
        g.take(*take)
    g.result = g.check()
    for line in g.notes:
        print(line, flush=True)
    return g


def _write_json(path, option, data):
    from .presets import write_text_atomic

    try:
        write_text_atomic(path, json.dumps(data, indent=2, default=float) + "\n")
    except OSError as e:
        raise CliError(f"{option} {path}: cannot write: {e.strerror or e}") from None


def _make_folder(path, option):
    try:
        Path(path).mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise CliError(f"{option} {path}: cannot make the folder ({e.strerror or e}), "
                       "expected a folder") from None


# ---- subcommands ----------------------------------------------------------------------------

def _setup_from(args):
    from .render import Setup, parse_setting

    return Setup(algorithm=args.algorithm, preset=args.preset,
                 settings=[parse_setting(s) for s in (args.set or [])])


def cmd_render(args):
    from .render import render

    from .dsp.layout import TRACE_NAMES

    trace_files = [f"{n}.wav" for n in ("input", "output", "key", *TRACE_NAMES)] + ["trace.json"]
    _guard(args, writes=[("--out", args.out), ("--summary-json", args.summary_json)],
           folders=[("--trace", args.trace, trace_files)] if args.trace else ())
    summary = render(args.input, args.out, _setup_from(args), key_path=args.key,
                     automation_path=args.automation, trace_dir=args.trace,
                     blocksize=args.blocksize, keep_latency=args.keep_latency,
                     subtype=args.format)
    for line in summary.lines():
        print(line)
    if args.trace:
        print(f"  traces written to {args.trace}/")
    if args.summary_json:
        _write_json(args.summary_json, "--summary-json", summary.as_dict())
    if summary.muted_blocks and not args.accept_muted:
        print(f"livedyn: error: {args.out}: {summary.muted_blocks} blocks of non-finite output "
              "were muted (use --accept-muted to exit 0 anyway)", file=sys.stderr)
        return EXIT_INCOMPLETE
    return 0


def _factory(args):
    from .render import build_processor

    setup = _setup_from(args)
    fs = args.samplerate
    probe = build_processor(setup, fs, 1, 0)
    kch = 1 if probe.algorithm.needs_key else 0

    def make():
        return build_processor(setup, fs, 1, kch)

    make()  # fail early on bad settings
    return make


def cmd_measure(args):
    from . import analysis

    if args.what == "distortion" and not (math.isfinite(args.frequency) and
                                          0 < args.frequency < args.samplerate / 4):
        raise CliError(f"--frequency {args.frequency:g}: expected a tone above 0 Hz and below "
                       f"a quarter of the sample rate ({args.samplerate / 4:g} Hz), so that "
                       "its harmonics are measured")
    _guard(args, writes=[("--json", args.json)],
           folders=[("--plot", args.plot, ("curve.png", "distortion.png"))] if args.plot else ())
    make = _factory(args)
    proc = make()
    title = f"{proc.algorithm.name} at {args.samplerate:g} Hz"
    print(title + ": " + ", ".join(f"{k} {v}" for k, v in proc.describe().items()))
    want_plot = args.plot is not None
    if want_plot and not analysis.have_matplotlib():
        print("(no plots: install the plot extra, pip install 'livedyn[plot]')")
        want_plot = False
    if want_plot:
        _make_folder(args.plot, "--plot")
    result = {}
    if args.what == "curve":
        signals = ("square", "sine") if args.signal == "both" else (args.signal,)
        rows = analysis.static_curve(make, signals=signals)
        what = "key level" if proc.algorithm.law == 3 and proc.algorithm.kind == "dynamics" \
            else "input"
        print(f"{what + ', dBFS':>16}{'signal':>8}{'output, dBFS':>14}{'theory':>9}{'error, dB':>11}")
        for r in rows:
            print(f"{r.level_db:16.1f}{r.signal:>8}{r.measured_db:14.2f}{r.theory_db:9.2f}"
                  f"{r.error_db:11.3f}")
        sq = [abs(r.error_db) for r in rows if r.signal == "square"]
        if sq and all(s != s for s in sq):  # all NaN: a whole user kernel
            print("(no theory column: livedyn does not know a whole kernel's curve; the key is "
                  "the main input here)")
        elif sq:
            print(f"largest square-wave error: {max(sq):.3f} dB")
        result["curve"] = [r.__dict__ for r in rows]
        if want_plot:
            path = Path(args.plot) / "curve.png"
            analysis.plot("curve", rows, path, title)
            print(f"plot: {path}")
    elif args.what == "timing":
        rows = analysis.timing(make)
        print(f"{'phase':>8}{'setting, ms':>13}{'tau (63 %), ms':>16}{'10-90 %, ms':>13}")
        for r in rows:
            print(f"{r.phase:>8}{r.setting_ms:13.2f}{r.tau_ms:16.2f}{r.rise_10_90_ms:13.2f}")
        print("(tau is the documented meaning of attack and release; 10-90 % = 2.197 tau for a "
              "one-pole)")
        result["timing"] = [r.__dict__ for r in rows]
    elif args.what == "latency":
        measured, reported = analysis.latency(make)
        print(f"latency: measured {measured} samples from an impulse, reported {reported} "
              f"samples ({1000 * reported / args.samplerate:.3f} ms)")
        result["latency"] = {"measured": measured, "reported": reported}
    elif args.what == "distortion":
        rows = analysis.distortion(make, freq=args.frequency)
        if not rows:
            raise CliError(f"{proc.algorithm.name} has no release control to sweep")
        print(f"THD of a {args.frequency:g} Hz tone at {rows[0].level_db:g} dBFS against "
              "release time")
        print(f"{'release, ms':>12}{'THD, %':>10}{'THD, dB':>10}")
        for r in rows:
            print(f"{r.release_ms:12.1f}{r.thd_percent:10.3f}{r.thd_db:10.1f}")
        result["distortion"] = [dict(r.__dict__, thd_db=r.thd_db) for r in rows]
        if want_plot:
            path = Path(args.plot) / "distortion.png"
            analysis.plot("distortion", rows, path, title)
            print(f"plot: {path}")
    if args.json:
        _write_json(args.json, "--json", result)
    return 0


def cmd_presets(args):
    from . import presets

    errors = []
    rows = presets.list_presets(on_error=errors.append)
    for name, desc, algo in rows:
        print(f"{name:24} {algo:11} {desc}")
    for e in errors:
        print(f"(skipped) {e}")
    if args.show:
        p = presets.load(args.show)
        print(presets.dumps(p), end="")
    return 0


# The demo: which shipped preset runs on which synthesised track, and with which key.
DEMO_PLAN = [
    ("drums-tame", "drums", None),
    ("drums-ceiling", "drums", None),
    ("bed-under-narrator", "music", "narrator"),
    ("narrator-gate", "narrator", None),
    ("narrator-level", "narrator", None),
    ("narrator-expand", "narrator", None),
]


def _have_soundcard():
    try:
        from .engine.stream import list_devices

        return any(d["outputs"] > 0 for d in list_devices())
    except Exception:
        return False


def cmd_demo(args):
    from . import demo
    from .render import Setup, render

    from .outputs import check_target

    out = Path(args.out)
    if not (args.seconds > 0):
        raise CliError(f"--seconds {args.seconds:g}: expected a duration above 0")
    check_target(out, "--out", folder=True)
    _make_folder(out, "--out")
    if not args.offline_only:
        headless = args.headless or not _have_soundcard()
        where = "headless (no soundcard found: a JACK server with its dummy backend)" \
            if headless else "on the default soundcard"
        print(f"Live: the narrator ducks the music bed, {where}; recording to {out / 'live'}/")
        _make_folder(out / "live", "--out")
        run_args = ["run", "--key-demo", "--seconds", str(args.seconds), "--record",
                    str(out / "live"), "--no-ui", "--samplerate", str(args.samplerate),
                    "--stats-json", str(out / "live" / "stats.json")]
        cmd_run(build_parser().parse_args(
            run_args + (["--headless", "--realtime"] if headless else [])))
        print()
    print(f"Offline: synthesising the rehearsal scenario ({args.seconds:g} s at {args.samplerate} Hz) "
          f"into {out}/")
    try:
        files = demo.write_scenario(out / "scenario", samplerate=args.samplerate,
                                    seconds=args.seconds)
    except ValueError as e:  # the demo's own one-line range errors (--seconds, --samplerate)
        raise CliError(str(e)) from None
    for name, track, key in DEMO_PLAN:
        dest = out / f"{name}.wav"
        s = render(files[track], dest, Setup(preset=name),
                   key_path=files[key] if key else None)
        print()
        for line in s.lines():
            print(line)
    print(f"\nListen to the files in {out}/ (start quietly).")
    return 0


def _channel_list(text, what):
    if text is None:
        return None
    try:
        chans = [int(t) for t in str(text).split(",") if t.strip()]
    except ValueError:
        raise CliError(f"{what} {text!r}: expected channel numbers such as 1,2") from None
    if not chans or min(chans) < 1:
        raise CliError(f"{what} {text!r}: expected channel numbers from 1, such as 1,2")
    return chans


def cmd_devices(args):
    from .engine.stream import DeviceError, list_devices

    try:
        devs = list_devices()
    except DeviceError as e:
        raise CliError(str(e)) from None
    if not devs:
        print("no audio devices found: install PortAudio (libportaudio2), check that the sound "
              "system sees the card, or use 'livedyn run --headless'")
        return 0
    print(f"{'#':>3}  {'name':32} {'host API':28} {'in':>3} {'out':>4} {'rate':>8}")
    for d in devs:
        print(f"{d['index']:>3}  {d['name'][:32]:32} {d['hostapi'][:28]:28} {d['inputs']:>3} "
              f"{d['outputs']:>4} {d['samplerate']:>8.0f}")
    return 0


def _status_line(snap, t):
    def peaks(v):
        return "/".join("-inf" if x <= -199 else f"{x:.1f}" for x in v) or "-"

    load = snap["callback_load"]
    return (f"{t:6.1f} s  in {peaks(snap['peak_in_dbfs'])}  out {peaks(snap['peak_out_dbfs'])} "
            f"dBFS  GR {snap['gain_reduction_db']:.1f} dB  load {100 * load['median']:.1f} % "
            f"(max {100 * load['max']:.0f} %)  late {snap['late_blocks']}  flagged "
            f"{snap['flagged_blocks']}")


def _run_with_status_lines(eng, server, main_src, args, seconds):
    """One status line a second until the time is up, the input ends, or the stream fails."""
    import time

    t0 = time.monotonic()
    next_line = 1.0
    try:
        while True:
            time.sleep(0.05)
            t = time.monotonic() - t0
            if not eng.watch() or (server is not None and not server.alive()):
                return eng.error or (f"the JACK server {server.name} stopped while the "
                                     "stream ran (killed or crashed)")
            for level, text in eng.take_notices():
                print(f"{t:6.1f} s  {level}: {text}", flush=True)
            if t >= next_line:
                print(_status_line(eng.snapshot(), t), flush=True)
                next_line += 1.0
            if seconds is not None and t >= seconds:
                return None
            if main_src is not None and not args.loop and eng.source_finished:
                return None
    except KeyboardInterrupt:
        print("stopping", flush=True)
    return None


def _run_with_console(eng, server, main_src, args, seconds):
    """The full-screen console until the user quits (or the time is up)."""
    from .console import run_console

    def check():
        if server is not None and not server.alive():
            return f"the JACK server {server.name} stopped while the stream ran"
        if main_src is not None and not args.loop and eng.source_finished:
            return "the input has played to its end"
        return None

    try:
        run_console(eng, title="livedyn run" + (" (headless)" if server else ""),
                    check=check, quit_after=seconds, refresh_hz=args.ui_refresh)
    except KeyboardInterrupt:
        pass
    if server is not None and not server.alive():
        return f"the JACK server {server.name} stopped while the stream ran (killed or crashed)"
    return eng.error


def cmd_run(args):
    from .engine.jackserver import JackError
    from .engine.stream import DeviceError

    try:
        return _cmd_run(args)
    except (DeviceError, JackError) as e:  # a device, rate or channel that cannot be had
        raise CliError(str(e).splitlines()[0] if str(e) else type(e).__name__) from None


def _cmd_run(args):
    import os

    from .engine import stream as st
    from .engine.engine import ArraySource, Engine, FileSource
    from .engine.jackserver import JackServer
    from .render import build_processor

    print(CAUTION, flush=True)
    if args.seconds is not None and not args.seconds > 0:
        raise CliError(f"--seconds {args.seconds:g}: expected a duration above 0")
    if not 16 <= args.blocksize <= 8192:
        raise CliError(f"--blocksize {args.blocksize}: expected 16 to 8192 frames")
    if args.headless and (args.device or args.input_device or args.output_device):
        raise CliError("--headless runs on a JACK server of its own: leave out --device, "
                       "--input-device and --output-device, or leave out --headless")
    if args.loopback and not args.headless:
        raise CliError("--loopback needs --headless (on hardware, connect a cable)")
    fs = args.samplerate
    if not (math.isfinite(fs) and fs == int(fs) and 8000 <= fs <= 384000):
        raise CliError(f"--samplerate {fs:g}: expected a whole number of Hz from 8000 to "
                       "384000")
    g = _guard(args, writes=[("--stats-json", args.stats_json)],
               take=("--record", args.record) if args.record else None)
    if args.record:  # a folder holding a take already gets a numbered one beside it
        args.record = g.result["take"]
        args.stats_json = g.moved(args.stats_json)
    main_in = _channel_list(args.main_inputs, "--main-inputs")
    key_in = _channel_list(args.key_inputs, "--key-inputs")
    outs = _channel_list(args.outputs, "--outputs")
    setup = _setup_from(args)
    main_src = key_src = None
    seconds = args.seconds
    interactive = not args.no_ui and sys.stdin.isatty() and sys.stdout.isatty()
    if args.key_demo:
        from . import demo

        length = seconds if seconds is not None else 16.0
        try:
            sc = demo.scenario(int(fs), seconds=max(length, 2.0))
        except ValueError as e:  # the scenario's own range errors: name the option
            raise CliError(f"--key-demo: {e}") from None
        if interactive and args.seconds is None:
            args.loop = True  # at the console the scene repeats until you quit
        main_src = ArraySource(sc["music"], loop=args.loop)
        key_src = ArraySource(sc["narrator"], loop=args.loop)
        if setup.algorithm is None and setup.preset is None:
            setup.preset = "bed-under-narrator"
        seconds = length if seconds is None and not args.loop else seconds
    if args.input_file:
        main_src = FileSource(args.input_file, loop=args.loop, samplerate=fs)
    if args.key_file:
        key_src = FileSource(args.key_file, loop=args.loop, samplerate=fs)
    ch = main_src.channels if main_src is not None else (len(main_in) if main_in else 2)
    kch = key_src.channels if key_src is not None else (len(key_in) if key_in else 0)
    if args.key_demo and not args.key_file and not _has_key(setup):
        # the scene's music alone: this algorithm has no key input for the narrator
        print("(--key-demo: the algorithm has no key input; playing the scene's music only)")
        key_src, kch = None, 0
    proc = build_processor(setup, fs, ch, kch)
    if args.watch and proc.algorithm.source is None:
        raise CliError(f"--watch: {proc.algorithm.name} is built in; --watch reloads an "
                       "algorithm file (--algorithm FILE.py)")
    _print_report(proc.algorithm)
    if args.headless and seconds is None and main_src is None:
        seconds = 10.0

    server = None
    if args.headless:
        need_in = max([2] + (main_in or []) + (key_in or []))
        need_out = max([2] + (outs or []))
        server = JackServer(int(fs), args.blocksize, capture=need_in, playback=need_out,
                            realtime=args.realtime).start()
        st.reinitialise()
        print(f"headless: JACK server {server.name} (dummy backend, {fs:g} Hz, "
              f"{args.blocksize} frames, real time {'granted' if server.realtime_granted else 'off'})",
              flush=True)
    try:
        eng = Engine(proc, args.blocksize, device=args.device if not args.headless else "system",
                     input_device=args.input_device, output_device=args.output_device,
                     main_inputs=main_in, key_inputs=key_in, outputs=outs, main_source=main_src,
                     key_source=key_src, record_dir=args.record, monitor=args.monitor)
        print(f"{proc.algorithm.name}: " +
              ", ".join(f"{k} {v}" for k, v in proc.describe().items()))
        print(f"latency: processor {proc.latency_samples} samples", end="")
        try:
            eng.start()  # checks rate and channels before the stream opens
        finally:
            if eng.stream is None:
                print(flush=True)  # end the line begun above
        if args.loopback:
            pairs = server.loopback()
            print(f"; loopback {', '.join(f'{a}->{b}' for a, b in pairs)}", end="")
    except BaseException:
        st.terminate()  # closes a stream left open, before its server goes
        if server is not None:
            server.stop()
        raise
    print(f"; stream reports input {1000 * eng.stream.input_latency:.2f} ms, output "
          f"{1000 * eng.stream.output_latency:.2f} ms", flush=True)
    watcher = None
    if args.watch:
        from .engine.watch import FileWatcher

        watcher = FileWatcher(eng, proc.algorithm.source).start()
        print(f"watching {proc.algorithm.source}: save it to hear the new version", flush=True)
    failure = None
    if not args.no_ui and sys.stdin.isatty() and sys.stdout.isatty():
        failure = _run_with_console(eng, server, main_src, args, seconds)
    else:
        failure = _run_with_status_lines(eng, server, main_src, args, seconds)
    if watcher is not None:
        watcher.stop()
    snap = eng.snapshot()
    if watcher is not None:
        snap["watch"] = {"versions_swapped": watcher.versions, "failed_loads": watcher.failures,
                         "swaps": eng.swap_log}
    if failure:
        eng.error = failure
    eng.stop()
    if eng.record_error:
        snap["record_error"] = eng.record_error
    stats_error = None
    if args.stats_json:
        from .presets import write_text_atomic

        snap["realtime_granted"] = bool(server.realtime_granted) if server else None
        try:
            write_text_atomic(args.stats_json, json.dumps(snap, indent=2, default=float) + "\n")
        except OSError as e:  # disk full, say: the take and the server still get closed
            stats_error = f"--stats-json {args.stats_json}: cannot write: {e.strerror or e}"
    if failure:
        print(f"livedyn: error: {failure}", file=sys.stderr, flush=True)
        if server is not None:
            server.reclaim()
        sys.stdout.flush()
        os._exit(3)  # PortAudio cannot be shut down cleanly once its server is gone
    st.terminate()
    if server is not None:
        server.stop()
    print(f"done: {snap['blocks']} blocks, {snap['late_blocks']} late, "
          f"{snap['flagged_blocks']} flagged, callback load median "
          f"{100 * snap['callback_load']['median']:.1f} % / 99.9th "
          f"{100 * snap['callback_load']['p99_9']:.1f} % of the block period"
          + (f"; recorded to {args.record}/" if args.record else ""))
    for line in (eng.record_error, stats_error):
        if line:
            print(f"livedyn: error: {line}", file=sys.stderr, flush=True)
    if eng.record_error or stats_error:
        return EXIT_INCOMPLETE
    return 0


def _has_key(setup):
    """Whether the algorithm a Setup names takes a key input (a preset's or the default)."""
    from . import algorithms, presets
    from .render import algorithm_of

    preset = presets.load(setup.preset) if setup.preset else None
    return "key" in algorithms.get(algorithm_of(setup, preset)).schema


def _print_report(alg):
    """A user algorithm's load-time check report, indented under its name."""
    if alg.source is None:
        return
    print(f"{alg.source}: checks passed")
    for line in alg.report:
        print(f"  {line}")


def cmd_check(args):
    from .algorithms.user import UserAlgorithmError, load

    try:
        alg = load(args.file)
    except UserAlgorithmError as e:
        if args.full and e.detail:
            print(e.detail, file=sys.stderr)
        raise
    _print_report(alg)
    return 0


def cmd_new_algorithm(args):
    from .algorithms.template import write_template

    path = write_template(args.name, stage=args.stage)
    print(f"wrote {path}: try it with  livedyn run --headless --key-demo --algorithm {path} "
          f"--watch")
    return 0


def _bench():
    """The bench/ package of the source tree (it is not installed with livedyn)."""
    root = Path(__file__).resolve().parent.parent
    if not (root / "bench" / "__init__.py").exists():
        raise CliError("the bench harness lives in the source tree's bench/ folder; run livedyn "
                       "from a clone of the repository")
    if str(root) not in sys.path:
        sys.path.insert(0, str(root))
    import bench

    return bench


def cmd_bench(args):
    _bench()
    from bench import live

    what = args.what
    result = {}
    from .algorithms.user import is_user_file

    user_file = is_user_file(args.algorithm)
    if user_file and what in ("kernels", "all"):
        from bench.user import format_user, run_user

        result["kernels"] = run_user(args.algorithm, quick=args.quick,
                                     samplerate=int(args.samplerate))
        print(format_user(result["kernels"]), flush=True)
    elif what in ("kernels", "all"):
        from bench.kernels import machine_info, report
        from bench.sweep import run_sweep

        rows = run_sweep(quick=args.quick)
        result["kernels"] = report(rows, machine_info())
    if what in ("stream", "all"):
        seconds = args.seconds or (5.0 if args.quick else 60.0)
        kw = dict(seconds=seconds, algorithm=args.algorithm, samplerate=int(args.samplerate),
                  blocksize=args.blocksize, headless=not args.device, device=args.device,
                  realtime=not args.no_realtime)
        if args.find_max:
            best, rows = live.find_max(**kw)
            print(f"largest safe instance count: {best}")
            result["stream"] = {"find_max": best, "runs": rows}
        else:
            loads = [None, "python-thread", "compile"] if args.load == "all" else \
                [None if args.load == "none" else args.load]
            result["stream"] = [live.run_stream(instances=args.instances, load=ld, **kw)
                                for ld in loads]
    if what in ("swap", "all"):
        swaps = args.swaps if args.swaps is not None else (5 if args.quick else 20)
        if swaps < 1:
            raise CliError(f"--swaps {swaps}: expected a whole number of at least 1")
        result["swap"] = live.run_swap(swaps=swaps, algorithm=args.algorithm,
                                       samplerate=int(args.samplerate), blocksize=args.blocksize,
                                       headless=not args.device, device=args.device,
                                       realtime=not args.no_realtime)
    if what in ("latency", "all"):
        result["latency"] = live.run_latency(repeats=args.repeats, samplerate=int(args.samplerate),
                                             blocksize=args.blocksize, headless=not args.device,
                                             device=args.device, realtime=not args.no_realtime)
    plots = []
    if args.plot:
        from bench import plots as bp

        if not bp.have_matplotlib():
            print("(no plots: install the plot extra, pip install 'livedyn[plot]')")
        else:
            Path(args.plot).mkdir(parents=True, exist_ok=True)
            if "kernels" in result and not user_file:
                plots.append(Path(args.plot) / "kernel-cost.png")
                bp.plot_kernel_cost(result["kernels"]["rows"], plots[-1])
            runs = result.get("stream")
            runs = runs["runs"] if isinstance(runs, dict) else runs
            if runs:
                plots.append(Path(args.plot) / "callback-times.png")
                bp.plot_callback_histogram(runs[0]["callback_shares"], plots[-1],
                                           title=f"callback time, {runs[0]['algorithm']}, "
                                                 f"block {runs[0]['blocksize']}")
            for p in plots:
                print(f"plot: {p}")
    for r in (result.get("stream") if isinstance(result.get("stream"), list) else
              (result.get("stream") or {}).get("runs", [])):
        r.pop("callback_shares", None)
    if args.json:
        live.write_json(args.json, result)
        print(f"results written to {args.json}")
    return 0


# ---- parser ---------------------------------------------------------------------------------

def _add_setup(p):
    p.add_argument("--algorithm", metavar="NAME",
                   help="compressor, limiter, expander, gate, ducker, or an algorithm file "
                        "FILE.py (see livedyn new-algorithm)")
    p.add_argument("--preset", metavar="NAME_OR_FILE", help="a shipped preset name or a .toml")
    p.add_argument("--set", metavar="NAME=VALUE", action="append",
                   help="set a parameter, e.g. --set threshold=-18 --set ratio=4:1 (repeatable)")


def build_parser():
    from . import __version__

    ap = argparse.ArgumentParser(
        prog="livedyn",
        description="Dynamics processors (compressor, limiter, expander, gate, ducker) for "
                    "live and offline use.")
    ap.add_argument("--version", action="version", version=f"livedyn {__version__}")
    sub = ap.add_subparsers(dest="command", metavar="COMMAND")

    r = sub.add_parser("render", help="process a WAV file offline",
                       description="Process a WAV file offline through a processor.")
    r.add_argument("input", metavar="IN.wav")
    r.add_argument("--out", required=True, metavar="OUT.wav")
    r.add_argument("--key", metavar="KEY.wav", help="external key (side-chain) input")
    _add_setup(r)
    r.add_argument("--automation", metavar="FILE", help="frame-stamped parameter changes")
    r.add_argument("--trace", metavar="DIR", help="write every stage's signal for porting checks")
    r.add_argument("--blocksize", type=int, default=1024, metavar="N")
    r.add_argument("--keep-latency", action="store_true",
                   help="do not take the processor's latency off the output")
    r.add_argument("--format", choices=["PCM_16", "PCM_24", "PCM_32", "FLOAT"],
                   help="output sample format (default: as the input)")
    r.add_argument("--summary-json", metavar="FILE")
    r.add_argument("--accept-muted", action="store_true",
                   help="exit 0 even when blocks of non-finite output were muted (they are "
                        "written as silence and counted in the summary either way)")
    r.set_defaults(func=cmd_render)

    m = sub.add_parser("measure", help="measure a processor: curve, timing, latency, distortion",
                       description="Measure a configured processor with synthetic signals.")
    m.add_argument("what", choices=["curve", "timing", "latency", "distortion"])
    _add_setup(m)
    m.add_argument("--samplerate", type=float, default=48000.0)
    m.add_argument("--signal", choices=["square", "sine", "both"], default="both",
                   help="test signal of the curve sweep")
    m.add_argument("--frequency", type=float, default=50.0, help="tone of the distortion test")
    m.add_argument("--plot", metavar="DIR", help="write PNG plots here (plot extra)")
    m.add_argument("--json", metavar="FILE")
    m.set_defaults(func=cmd_measure)

    d = sub.add_parser("demo", help="the rehearsal demo: live ducking, then offline renders",
                       description="The built-in rehearsal scenario (drum loop, music bed, "
                                   "narrator), synthesised by livedyn: first live, the narrator "
                                   "ducking the music bed (headless when there is no soundcard), "
                                   "then offline through every shipped preset.")
    d.add_argument("--out", default="demo-out", metavar="DIR")
    d.add_argument("--seconds", type=float, default=16.0)
    d.add_argument("--samplerate", type=int, default=48000)
    d.add_argument("--offline-only", action="store_true", help="skip the live part")
    d.add_argument("--headless", action="store_true",
                   help="run the live part on a JACK dummy server even if a soundcard exists")
    d.set_defaults(func=cmd_demo)

    rn = sub.add_parser("run", help="run a processor live on a soundcard or headless",
                        description="Run a processor live. " + CAUTION)
    rn.add_argument("--device", metavar="D", help="device index or name (both directions)")
    rn.add_argument("--input-device", metavar="D")
    rn.add_argument("--output-device", metavar="D")
    rn.add_argument("--samplerate", type=float, default=48000.0)
    rn.add_argument("--blocksize", type=int, default=64, metavar="N")
    _add_setup(rn)
    rn.add_argument("--main-inputs", metavar="1,2", help="device channels of the main input")
    rn.add_argument("--key-inputs", metavar="3", help="device channels of the key input")
    rn.add_argument("--outputs", metavar="1,2", help="device channels that carry the output")
    rn.add_argument("--input-file", metavar="F", help="play a WAV file as the main input")
    rn.add_argument("--key-file", metavar="F", help="play a WAV file as the key input")
    rn.add_argument("--key-demo", action="store_true",
                    help="the rehearsal demo: the narrator ducks the music bed")
    rn.add_argument("--loop", action="store_true", help="loop file and demo inputs")
    rn.add_argument("--seconds", type=float, metavar="S", help="stop after S seconds")
    rn.add_argument("--record", metavar="DIR",
                    help="write main.wav, key.wav, out.wav and automation.txt here")
    rn.add_argument("--stats-json", metavar="FILE", help="write the run's statistics here")
    rn.add_argument("--monitor", choices=["out", "key", "delta"], default="out",
                    help="what the outputs carry: processed, filtered key, or what was removed")
    rn.add_argument("--no-ui", action="store_true",
                    help="no console: print one status line a second (also when not on a "
                         "terminal)")
    rn.add_argument("--ui-refresh", type=float, default=20.0, metavar="HZ",
                    help="console meter refresh rate (default 20)")
    rn.add_argument("--headless", action="store_true",
                    help="start a JACK server with its dummy backend (no soundcard needed)")
    rn.add_argument("--loopback", action="store_true",
                    help="headless: patch the outputs back to the inputs (latency checks)")
    rn.add_argument("--watch", action="store_true",
                    help="reload the algorithm file when it changes, without a dropout")
    rn.add_argument("--realtime", action="store_true",
                    help="ask for real-time scheduling where the system allows it")
    rn.set_defaults(func=cmd_run)

    bn = sub.add_parser("bench", help="what an algorithm costs, stream headroom, swaps, latency",
                        description="Measure kernel cost, live-stream headroom, the cost of a "
                                    "live swap and round-trip latency (headless JACK server "
                                    "unless --device is given).")
    bn.add_argument("what", choices=["kernels", "stream", "swap", "latency", "all"])
    bn.add_argument("--quick", action="store_true", help="short runs for a smoke test")
    bn.add_argument("--algorithm", default="compressor",
                    help="built-in name or FILE.py: kernels then times the file beside the "
                         "built-in compressor")
    bn.add_argument("--instances", type=int, default=1, metavar="K")
    bn.add_argument("--find-max", action="store_true",
                    help="raise K until blocks are late or the callback passes 70 %% load")
    bn.add_argument("--load", choices=["none", "python-thread", "compile", "all"], default="all",
                    help="interpreter load in the same process during the stream run")
    bn.add_argument("--seconds", type=float, help="stream run length (default 60, quick 5)")
    bn.add_argument("--repeats", type=int, default=5, help="latency measurements")
    bn.add_argument("--swaps", type=int, metavar="N",
                    help="live swaps to time, the algorithm to a fresh instance of itself "
                         "(default 20, quick 5)")
    bn.add_argument("--samplerate", type=float, default=48000.0)
    bn.add_argument("--blocksize", type=int, default=64)
    bn.add_argument("--device", help="measure on this device instead of a headless server")
    bn.add_argument("--no-realtime", action="store_true",
                    help="do not ask for real-time scheduling on the headless server")
    bn.add_argument("--json", metavar="FILE")
    bn.add_argument("--plot", metavar="DIR", help="write PNG plots here (plot extra)")
    bn.set_defaults(func=cmd_bench)

    ck = sub.add_parser("check", help="compile and check an algorithm file, print the report",
                        description="Compile an algorithm file and run livedyn's load-time "
                                    "checks on it.")
    ck.add_argument("file", metavar="FILE.py")
    ck.add_argument("--full", action="store_true", help="print the compiler's whole message")
    ck.set_defaults(func=cmd_check)

    na = sub.add_parser("new-algorithm", help="write a commented starting algorithm file",
                        description="Write NAME.py, a commented algorithm file to edit.")
    na.add_argument("name", metavar="NAME", help="file name (NAME.py) or path")
    na.add_argument("--stage", choices=["gain_curve", "detector", "smoother", "kernel"],
                    default="gain_curve", help="which stage the file starts with")
    na.set_defaults(func=cmd_new_algorithm)

    dv = sub.add_parser("devices", help="list audio devices", description="List audio devices.")
    dv.set_defaults(func=cmd_devices)

    ps = sub.add_parser("presets", help="list the shipped presets",
                        description="List the shipped presets.")
    ps.add_argument("--show", metavar="NAME", help="print one preset")
    ps.set_defaults(func=cmd_presets)
    return ap


def _shortened(msg):
    """The error line with every overlong value in it cut short."""
    from .outputs import short

    if len(msg) <= 400:
        return msg
    return " ".join(short(t) for t in msg.split(" "))


def main(argv=None):
    ap = build_parser()
    args = ap.parse_args(argv)
    if not getattr(args, "func", None):
        ap.print_help()
        return EXIT_USAGE
    from . import dsp

    dsp.announce = dsp.announce_on_stdout
    from . import render

    render.announce = lambda line: print(line, flush=True)
    try:
        return args.func(args)
    except _user_errors() as e:
        msg = str(e).splitlines()[0] if str(e) else type(e).__name__
        if isinstance(e, OSError) and e.filename:
            msg = f"{e.filename}: {e.strerror}"
        print(f"livedyn: error: {_shortened(msg)}", file=sys.stderr)
        return EXIT_USAGE
    except KeyboardInterrupt:
        print("livedyn: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
