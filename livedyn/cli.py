"""The ``livedyn`` command: thin subcommands over the library.

Every user error ends in one line ``livedyn: error: ...`` and exit code 2; nothing is
overwritten by a command that fails.
"""
from __future__ import annotations

import argparse
import dataclasses
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


def _check_target(path, option, protect=()):
    """Refuse a file to be written later (--summary-json, --json) before any work is done."""
    p = Path(path)
    for other in protect:
        if other is not None and p.resolve() == Path(other).resolve():
            raise CliError(f"{option} {path}: is one of the command's audio or automation "
                           "files; choose another name")
    from .files import target_problem

    problem = target_problem(p)
    if problem:
        raise CliError(f"{option} {path}: {problem}")


def _guard(args, writes=(), folders=(), take=None):
    """Check every path the command will write against what it reads and each other
    (livedyn.outputs) before anything is opened; returns the checked Outputs."""
    from .outputs import Outputs

    g = Outputs()
    for option, attr in (("IN.wav", "input"), ("--key", "key"), ("--automation", "automation"),
                         ("--input-file", "input_file"), ("--key-file", "key_file")):
        value = getattr(args, attr, None)
        for path in value if isinstance(value, list) else [value]:  # (IN.wav ... of some)
            g.read(option, path)
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
    from .files import write_text_atomic

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
                 settings=[parse_setting(s) for s in (args.set or [])],
                 precision=getattr(args, "precision", None))


def cmd_render(args):
    from .render import render

    from .dsp.layout import TRACE_NAMES

    trace_files = [f"{n}.wav" for n in ("input", "output", "key", *TRACE_NAMES)] + ["trace.json"]
    _guard(args, writes=[("--out", args.out), ("--summary-json", args.summary_json)],
           folders=[("--trace", args.trace, trace_files)] if args.trace else ())
    summary = render(args.input, args.out, _setup_from(args), key_path=args.key,
                     automation_path=args.automation, trace_dir=args.trace,
                     blocksize=args.blocksize, keep_latency=args.keep_latency,
                     subtype=args.format, layout=args.layout)
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


#: The measurements of ``livedyn measure``, with what each one does.
MEASUREMENTS = {
    "curve": "the static curve from a steady level sweep, against the theoretical curve",
    "timing": "attack and release time constants from level steps",
    "latency": "the delay of the main path from an impulse, against the reported latency",
    "distortion": "THD of a low tone against release time",
}


def cmd_measure(args):
    from . import analysis

    if args.what is None:
        print("livedyn measure WHAT: one of")
        for k, v in MEASUREMENTS.items():
            print(f"  {k:11} {v}")
        raise CliError("measure: expected a measurement: " + ", ".join(MEASUREMENTS))

    if args.what == "distortion" and not (math.isfinite(args.frequency) and
                                          0 < args.frequency < args.samplerate / 4):
        raise CliError(f"--frequency {args.frequency:g}: expected a tone above 0 Hz and below "
                       f"a quarter of the sample rate ({args.samplerate / 4:g} Hz), so that "
                       "its harmonics are measured")
    _guard(args, writes=[("--json", args.json)],
           folders=[("--plot", args.plot, ("curve.png", "distortion.png"))] if args.plot else ())
    make = _factory(args)
    proc = make()
    import textwrap

    settings = ", ".join(f"{k} {v}" for k, v in proc.describe().items())
    title = f"{proc.algorithm.name} at {args.samplerate:g} Hz"
    print(title + ": " + settings)
    # plot titles carry the settings, wrapped to the figure's width
    title = "\n".join(textwrap.wrap(f"{title}: {settings}", 95))
    keyed = proc.algorithm.needs_key and proc.algorithm.kind == "dynamics"
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
        what = "key level" if keyed else "input"
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
        vals = proc.values()
        if int(vals.get("detector", 0)) == 1 and proc.algorithm.kind == "dynamics":
            print("(rms detector: it is sine-referenced, so a square reads 3.01 dB above its "
                  "peak; the theory uses that reading)")
        if int(vals.get("topology", 0)) == 1 and proc.algorithm.law == 0:
            print("(feedback: the theory is the output y solving y = x + g(y), with the curve "
                  "on the output level at slope ratio - 1)")
        if vals.get("true_peak", 0) > 0.5 and proc.algorithm.kind == "limiter":
            print("(true peak: the theory uses the 4x interpolated peak of the test signal, "
                  "which for a square lies above its sample peak)")
        result["curve"] = [r.__dict__ for r in rows]
        if want_plot:
            path = Path(args.plot) / "curve.png"
            analysis.plot("curve", rows, path, title,
                          x_label=("key level, dBFS" if keyed else "input level, dBFS"))
            print(f"plot: {path}")
    elif args.what == "timing":
        rows = analysis.timing(make)
        print(f"{'phase':>8}{'setting, ms':>13}{'hold, ms':>10}{'tau (63 %), ms':>16}"
              f"{'ramp, ms':>10}{'10-90 %, ms':>13}  law")
        for r in rows:
            tau = "" if r.law == "linear ramp" else f"{r.tau_ms:.2f}"
            ramp = f"{r.ramp_ms:.2f}" if r.law == "linear ramp" else ""
            print(f"{r.phase:>8}{r.setting_ms:13.2f}{r.hold_ms:10.2f}{tau:>16}{ramp:>10}"
                  f"{r.rise_10_90_ms:13.2f}  {r.law}")
        if proc.algorithm.kind == "limiter":
            print("(the limiter's attack is a straight ramp of the linear gain over attack ms "
                  "(plus one sample), starting when a peak enters the lookahead; its release "
                  "is a one-pole of tau release in dB, after the lookahead's hold)")
        else:
            print("(tau, counted from the first movement after the hold, is the documented "
                  "meaning of attack and release; 10-90 % = 2.197 tau for a one-pole)")
        result["timing"] = [r.as_dict() for r in rows]
        if want_plot:
            path = Path(args.plot) / "timing.png"
            analysis.plot("timing", rows, path, title)
            print(f"plot: {path}")
    elif args.what == "latency":
        measured, reported = analysis.latency(make)
        print(f"latency: measured {measured} samples from an impulse, reported {reported} "
              f"samples ({1000 * reported / args.samplerate:.3f} ms)")
        result["latency"] = {"measured": measured, "reported": reported}
        if want_plot:
            x, y = analysis.impulse_response(make)
            path = Path(args.plot) / "latency.png"
            analysis.plot("latency", (x, y, args.samplerate), path, title)
            print(f"plot: {path}")
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


def cmd_ready(args):
    """Whether this machine can run the chosen block size: limits, governor, kernel, swap,
    sound devices and a native wake-up measurement. Exit code 1 when an item fails."""
    from . import readiness

    if args.json and args.json != "-":
        _check_target(args.json, "--json")
    try:
        rep = readiness.check(samplerate=args.samplerate, blocksize=args.blocksize,
                              seconds=args.seconds,
                              out=None if args.json == "-" else
                              (lambda t: print(t, file=sys.stderr, flush=True)))
    except readiness.ReadinessError as e:
        raise CliError(str(e)) from None
    if args.json == "-":
        sys.stdout.write(readiness.to_json(rep))
    else:
        print(readiness.format_report(rep))
        if args.json:
            from .presets import write_text_atomic

            write_text_atomic(args.json, readiness.to_json(rep))
            print(f"report written to {args.json}")
    return 1 if rep["verdict"] == readiness.FAIL else 0
def cmd_port_kit(args):
    from .port.kit import write_kit

    blocks = [int(b) for b in (args.blocksize or [])] or None
    if blocks is not None and len(blocks) != 2:
        raise CliError(f"--blocksize given {len(blocks)} times: expected twice (two block "
                       "sizes) or not at all (64 and 1000)")
    for w in args.wav or []:
        if Path(w).resolve().is_relative_to(Path(args.out).resolve()):
            raise CliError(f"--wav {w}: lies inside --out {args.out}; choose another folder")
    kw = {} if blocks is None else {"blocksizes": blocks}
    m = write_kit(args.out, _setup_from(args), samplerate=args.samplerate,
                  channels=args.channels, wavs=args.wav or (), **kw)
    print(f"{m['algorithm']}: port kit in {args.out}/ ({m['frames']} frames at "
          f"{m['samplerate']:g} Hz, {m['channels']} ch, key {m['key_channels']} ch, block sizes "
          f"{' and '.join(str(b) for b in m['block_sizes'])}, latency {m['latency_samples']} "
          f"samples)")
    print(f"  C reference: {m['c_stages']}")
    print(f"  build and check: make -C {args.out}/c check   (bit for bit: make -C {args.out}/c "
          "exact)")
    return 0


def cmd_precision_audit(args):
    """Run settings in float64 and float32 and report what differs (livedyn/audit.py)."""
    from . import audit as au
    from .render import Setup

    plot = args.plot
    if plot is not None:
        from .analysis import have_matplotlib

        if not have_matplotlib():
            raise CliError("--plot: needs matplotlib (pip install matplotlib)")
        if not str(plot).lower().endswith(".png"):
            raise CliError(f"--plot {plot}: expected a .png file name")
        _guard(args, writes=[("--plot", plot)])
    setups = []
    if args.every:
        if args.algorithm or args.preset or args.set:
            raise CliError("--every audits every shipped preset and example file; leave out "
                           "--algorithm, --preset and --set")
        from .presets import list_presets, presets_dir
        from .shipped import examples_folder

        for name, _, _ in list_presets(presets_dir()):
            setups.append(Setup(preset=name))
        for f in sorted(examples_folder().glob("*.py")):
            setups.append(Setup(algorithm=str(f)))
    else:
        setups.append(_setup_from(args))
    over, audits = [], []
    for setup in setups:
        a = au.audit(setup, samplerate=args.samplerate, channels=args.channels,
                     inputs=args.input or (), key_path=args.key)
        audits.append(a)
        print(au.format_audit(a), flush=True)
        if not a.within:
            over.append(a.label)
    if plot is not None:
        au.plot(audits[0] if len(audits) == 1 else
                au.Audit("every shipped preset and example (test programme)", args.samplerate,
                         [dataclasses.replace(a.rows[0], signal=a.label) for a in audits]),
                plot)
        print(f"plot written to {plot}")
    if over:
        print(f"over the {au.BOUND_DB:g} dB bound: {', '.join(over)}")
        return 1
    return 0


def cmd_presets(args):
    from . import presets

    if args.show:
        p = presets.load(args.show)
        print(presets.dumps(p), end="")
        return 0
    errors = []
    rows = presets.list_presets(on_error=errors.append)
    for name, desc, algo in rows:
        print(f"{name:24} {algo:11} {desc}")
    for e in errors:
        print(f"(skipped) {e}")
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
            run_args + (["--headless"] if headless else [])
            + (["--no-realtime"] if args.no_realtime else [])))
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


#: Output level a live run starts at, dB (a choice of ours for hearing: 12 dB below unity,
#: common practice of starting a monitor low, no source).
DEFAULT_OUTPUT_LEVEL_DB = -12.0


def _osc_options(args):
    """Check --osc, --osc-bind and --osc-allow before anything opens: ``(bind, networks,
    warning)`` or None without --osc."""
    if args.osc is None:
        if args.osc_bind or args.osc_allow:
            raise CliError("--osc-bind and --osc-allow need --osc [PORT]")
        return None
    from .control.osc import OscError, check_bind

    if not 0 <= args.osc <= 65535:
        raise CliError(f"--osc {args.osc}: expected a UDP port 1 to 65535 (0: any free port)")
    try:
        return check_bind(args.osc_bind or "127.0.0.1", args.osc_allow)
    except OscError as e:
        raise CliError(str(e)) from None


def _start_controls(eng, args, osc=None):
    """The remote controls a run asked for (None when none): MIDI from --midi, OSC from
    --osc (``osc`` from :func:`_osc_options`)."""
    if not args.midi and osc is None:
        return None
    from .control.hub import Controls
    from .control.midi import MidiControl, MidiError, load_mappings, open_port

    controls = Controls(eng)
    if args.midi:
        try:
            mappings = load_mappings(args.midi_map) if args.midi_map else []
            for m in mappings:
                controls.check_target(m.target)
            port, name = open_port(args.midi)
        except MidiError as e:
            raise CliError(str(e)) from None
        MidiControl(controls, port, mappings, name).start()
        print(f"MIDI: reading {name} ({len(mappings)} mappings)", flush=True)
    if osc is not None:
        from .control.osc import OscControl, OscError

        bind, nets, warning = osc
        try:
            o = OscControl(controls, args.osc, bind=bind, allow=nets)
        except OscError as e:
            controls.stop()
            raise CliError(str(e)) from None
        if warning:
            print(f"Warning: {warning}", flush=True)
        print(o.describe(), flush=True)
        o.start()
    return controls.start()


def _print_midi_ports():
    try:
        from .control.midi import list_ports

        ports = list_ports()
    except Exception as e:  # MIDI is optional to the audio listing
        print(f"MIDI inputs: unavailable ({str(e).splitlines()[0]})")
        return
    if not ports:
        print("MIDI inputs: none (no JACK server or ALSA sequencer answers)")
    for i, p in enumerate(ports):
        print(f"MIDI input {i}: {p['api']}: {p['name']}  (--midi {i})")


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
    _print_midi_ports()
    return 0


def cmd_run(args):
    from .engine.jackserver import JackError
    from .engine.stream import DeviceError

    try:
        return _cmd_run(args)
    except (DeviceError, JackError) as e:  # a device, rate or channel that cannot be had
        raise CliError(str(e).splitlines()[0] if str(e) else type(e).__name__) from None


def _cmd_run(args):
    import signal

    from .engine.engine import ArraySource, FileSource
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
    _apply_picked(args)
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
    osc = _osc_options(args)
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
    main_src, key_src, ch, kch = _test_sources(args, fs, main_src, key_src, ch, kch)
    proc = build_processor(setup, fs, ch, kch)
    if args.watch and proc.algorithm.source is None:
        raise CliError(f"--watch: {proc.algorithm.name} is built in; --watch reloads an "
                       "algorithm file (--algorithm FILE.py)")
    _print_report(proc.algorithm)
    from .params import OUTPUT_LEVEL, ParamError

    try:
        out_level = OUTPUT_LEVEL.parse(args.output_level)
    except ParamError as e:
        raise CliError(f"--output-level {args.output_level}: {e}") from None

    from .engine.session import LiveSession

    session = LiveSession(
        proc, args.blocksize, headless=args.headless, realtime=not args.no_realtime,
        capture=max([2] + (main_in or []) + (key_in or [])),
        playback=max([2] + (outs or [])), watch=args.watch,
        device=args.device if not args.headless else None, input_device=args.input_device,
        output_device=args.output_device, main_inputs=main_in, key_inputs=key_in, outputs=outs,
        main_source=main_src, key_source=key_src, record_dir=args.record, monitor=args.monitor,
        output_level_db=out_level, variants=not args.general_kernel)
    print(f"{proc.algorithm.name}" + (f" ({proc.precision})" if proc.precision != "float64"
                                      else "") + ": " +
          ", ".join(f"{k} {v}" for k, v in proc.describe().items()), flush=True)
    session.open()
    server, eng = session.server, session.engine
    if server is not None:
        print(f"headless: JACK server {server.name} (dummy backend, {fs:g} Hz, "
              f"{args.blocksize} frames, real time "
              f"{'granted' if server.realtime_granted else 'off'})", flush=True)
        if server.realtime_note and not args.no_realtime:
            print(server.realtime_note, flush=True)
    line = f"latency: processor {proc.latency_samples} samples"
    if args.loopback:
        pairs = server.loopback()
        line += f"; loopback {', '.join(f'{a}->{b}' for a, b in pairs)}"
    print(line + f"; stream reports input {1000 * eng.stream.input_latency:.2f} ms, output "
          f"{1000 * eng.stream.output_latency:.2f} ms", flush=True)
    from .engine.realtime import describe

    print(describe(eng.wait_realtime(1.0)), flush=True)
    if session.watcher is not None:
        print(f"watching {proc.algorithm.source}: save it to hear the new version", flush=True)
    controls = _start_controls(eng, args, osc)
    if seconds is None and (main_src is None or args.loop or main_src.kind != "input"):
        print("runs until you stop it (q in the console, Ctrl+C otherwise)", flush=True)
    until_end = main_src is not None and not args.loop
    own_controls = interactive and controls is None  # the console's midi command needs a hub
    if own_controls:
        from .control.hub import Controls

        controls = Controls(eng).start()
    try:
        if interactive:
            from .console import run_console

            session.run_console(run_console, seconds, until_source_ends=until_end,
                                refresh_hz=args.ui_refresh, controls=controls)
        else:
            session.run_status_lines(seconds, until_source_ends=until_end)
    finally:
        if controls is not None:
            controls.stop()
    snap = session.close(stats_json=args.stats_json)  # on a failure: one line, exit code 3
    print(f"done: {snap['blocks']} blocks, {snap['late_blocks']} late, "
          f"{snap['flagged_blocks']} flagged, callback load median "
          f"{100 * snap['callback_load']['median']:.1f} % / 99.9th "
          f"{100 * snap['callback_load']['p99_9']:.1f} % of the block period"
          + (f"; recorded to {args.record}/" if args.record else ""))
    for line in (eng.record_error, session.stats_error):
        if line:
            print(f"livedyn: error: {line}", file=sys.stderr, flush=True)
    if eng.record_error or session.stats_error:
        return EXIT_INCOMPLETE
    # an orderly stop by SIGTERM or SIGHUP says so in the exit code (128 + the signal's
    # number, common practice, no source); Ctrl+C (SIGINT) is the usual way to end a run
    sig = session.signal_received
    return 0 if sig in (None, signal.SIGINT) else 128 + int(sig)


def _test_sources(args, fs, main_src, key_src, ch, kch):
    """--test-main / --test-key: a built-in test source as the main or key input; a file or
    demo input is wrapped in one too, so that the console's ``source`` command can switch to a
    test signal and back (``source main input``)."""
    from .control.sources import SourceError, TestSource

    if args.test_main:
        if args.input_file:
            raise CliError(f"--test-main {args.test_main}: leave out --input-file (the main "
                           "input is one or the other)")
        if main_src is not None and hasattr(main_src, "close"):
            main_src.close()
        ch = len(_channel_list(args.main_inputs, "--main-inputs") or [1, 2])
        main_src = _make_test(TestSource, SourceError, "--test-main", fs, ch, args.test_main)
    elif main_src is not None:
        main_src = TestSource(fs, main_src.channels, inner=main_src)
    if args.test_key:
        if args.key_file:
            raise CliError(f"--test-key {args.test_key}: leave out --key-file (the key "
                           "input is one or the other)")
        kch = len(_channel_list(args.key_inputs, "--key-inputs") or [1])
        key_src = _make_test(TestSource, SourceError, "--test-key", fs, kch, args.test_key)
    elif key_src is not None:
        key_src = TestSource(fs, key_src.channels, inner=key_src)
    for what, src in (("main", main_src), ("key", key_src)):
        if src is not None and src.kind != "input":
            print(f"test source as the {what} input: {src.description} (never above "
                  "-6 dBFS)", flush=True)
    return main_src, key_src, ch, kch


def _make_test(cls, err, option, fs, channels, spec):
    try:
        return cls(fs, channels, spec)
    except err as e:
        raise CliError(f"{option} {spec}: {e}") from None


def _apply_picked(args):
    """--picked: the devices and channels ``livedyn pick`` remembered (options given on the
    command line win)."""
    if not getattr(args, "picked", False):
        return
    from .console.picker import config_path, load_choice

    c = load_choice()
    if c is None:
        raise CliError(f"--picked: no device choice in {config_path()} yet; run livedyn pick "
                       "first")
    if not args.headless and not args.device:
        args.input_device = args.input_device or c.input_device
        args.output_device = args.output_device or c.output_device
    args.main_inputs = args.main_inputs or ",".join(map(str, c.main_inputs))
    if c.key_inputs and not args.key_inputs:
        args.key_inputs = ",".join(map(str, c.key_inputs))
    devs = "" if args.headless or args.device else \
        f"input {args.input_device!r}, output {args.output_device!r}, "
    print(f"--picked: {devs}main inputs {args.main_inputs}, key inputs "
          f"{args.key_inputs or 'none'} (from {config_path()})", flush=True)


def cmd_pick(args):
    from .console.picker import (PickerError, PickerModel, build_picker_app, config_path,
                                 load_choice, save_choice)
    from .engine import stream as st

    server = None
    if args.headless:
        from .engine.jackserver import JackServer

        server = JackServer(int(args.samplerate), 64, capture=args.channels,
                            playback=2).start()
        st.reinitialise()
    try:
        try:
            remembered = load_choice()
        except PickerError as e:
            print(f"(ignoring the remembered choice: {e})")
            remembered = None
        model = PickerModel(st.list_devices(), remembered)
        build_picker_app(model).run()
        if model.choice is None:
            print("nothing saved")
            return 0
        path = save_choice(model.choice)
        print(f"saved to {path}: livedyn run --picked uses {model.choice.run_options()}")
        return 0
    finally:
        st.terminate()
        if server is not None:
            server.stop()


def _has_key(setup):
    """Whether the algorithm a Setup names takes a key input (a preset's or the default)."""
    from . import loader, presets
    from .render import algorithm_of

    preset = presets.load(setup.preset) if setup.preset else None
    return "key" in loader.get(algorithm_of(setup, preset)).schema


def _print_report(alg):
    """A user algorithm's load-time check report, indented under its name."""
    if alg.source is None:
        return
    print(f"{alg.source}: checks passed")
    for line in alg.report:
        print(f"  {line}")


def cmd_check(args):
    from .loader import UserAlgorithmError, load

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

    path = write_template(args.name, stage=args.stage, example=args.example)
    print(f"wrote {path}: try it with  livedyn run --headless --key-demo --algorithm {path} "
          f"--watch")
    return 0


def cmd_bench(args):
    from .bench import live

    what = args.what
    result = {}
    status = 0  # 1 when a bare-C loop disagreed with its kernel (MISMATCH)
    from .loader import is_user_file

    user_file = is_user_file(args.algorithm)
    if user_file and what in ("kernels", "all"):
        from .bench.user import format_user, run_user

        result["kernels"] = run_user(args.algorithm, quick=args.quick,
                                     samplerate=int(args.samplerate),
                                     precisions=(args.precision,) if args.precision else None)
        print(format_user(result["kernels"]), flush=True)
    elif what in ("kernels", "all"):
        from .bench.kernels import machine_info, report
        from .bench.sweep import run_sweep

        from .bench.bare import run_precision

        rows = run_sweep(quick=args.quick, wide=args.wide)
        precision = run_precision(quick=args.quick, wide=args.wide)
        result["kernels"] = report(rows, machine_info(), precision=precision)
        status = 0 if precision["ok"] else 1
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
        from .bench import plots as bp

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
    return status


# ---- parser ---------------------------------------------------------------------------------

def _add_setup(p):
    p.add_argument("--algorithm", metavar="NAME",
                   help="compressor, limiter, expander, gate, ducker, or an algorithm file "
                        "FILE.py (see livedyn new-algorithm); default: the preset's, else "
                        "compressor")
    p.add_argument("--preset", metavar="NAME_OR_FILE",
                   help="a shipped preset name (livedyn presets) or a .toml file; default none")
    p.add_argument("--set", metavar="NAME=VALUE", action="append",
                   help="set a parameter in its own unit (dBFS, dB, ms, Hz, ratio), e.g. --set "
                        "threshold=-18 --set ratio=4:1; a unique prefix names it (thr=-18); "
                        "repeatable, applied after the preset")
    p.add_argument("--precision", choices=("float64", "float32"), default=None,
                   help="arithmetic of the kernel: float64 (default) or float32, the single "
                        "precision most port targets use (also --set precision=float32)")


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
    r.add_argument("input", metavar="IN.wav",
                   help="the WAV file to process (16/24/32-bit integer or 32-bit float, any "
                        "rate, 1 to 8 channels)")
    r.add_argument("--out", required=True, metavar="OUT.wav",
                   help="the processed WAV file (required; RF64 past 4 GiB); never one of the "
                        "inputs")
    r.add_argument("--key", metavar="KEY.wav",
                   help="external key (side-chain) input, same rate and length as IN.wav; "
                        "default none (the key is the main input)")
    _add_setup(r)
    r.add_argument("--automation", metavar="FILE",
                   help="frame-stamped parameter changes to replay (README, Automation files); "
                        "default none")
    r.add_argument("--trace", metavar="DIR",
                   help="write every stage's signal here for porting checks; default none")
    r.add_argument("--blocksize", type=int, default=1024, metavar="N",
                   help="frames per processing block (default 1024); the output does not "
                        "depend on it")
    r.add_argument("--keep-latency", action="store_true",
                   help="do not take the processor's latency off the output")
    r.add_argument("--format", choices=["PCM_16", "PCM_24", "PCM_32", "FLOAT"],
                   help="output sample format (default: as the input)")
    r.add_argument("--summary-json", metavar="FILE",
                   help="also write the summary (loudness, peaks, gain reduction, latency) as "
                        "JSON; default none")
    r.add_argument("--layout", choices=["mono", "stereo", "5.0", "5.1", "7.1"],
                   help="channel layout of the loudness figures (BS.1770-4 channel weights: LFE "
                        "left out, surrounds +1.5 dB); default: from the channel count")
    r.add_argument("--accept-muted", action="store_true",
                   help="exit 0 even when blocks of non-finite output were muted (they are "
                        "written as silence and counted in the summary either way)")
    r.set_defaults(func=cmd_render)

    m = sub.add_parser("measure", help="measure a processor: curve, timing, latency, distortion",
                       description="Measure a configured processor with synthetic signals.")
    m.add_argument("what", nargs="?", choices=list(MEASUREMENTS), metavar="WHAT",
                   help="; ".join(f"{k}: {v}" for k, v in MEASUREMENTS.items()))
    _add_setup(m)
    m.add_argument("--samplerate", type=float, default=48000.0, metavar="HZ",
                   help="sample rate of the test signals, Hz (default 48000)")
    m.add_argument("--signal", choices=["square", "sine", "both"], default="both",
                   help="test signal of the curve sweep (default both)")
    m.add_argument("--frequency", type=float, default=50.0, metavar="HZ",
                   help="tone of the distortion test, Hz (default 50)")
    m.add_argument("--plot", metavar="DIR",
                   help="write PNG plots here (plot extra); default none")
    m.add_argument("--json", metavar="FILE",
                   help="also write the results as JSON; default none")
    m.set_defaults(func=cmd_measure)

    pk = sub.add_parser("port-kit", help="golden vectors and a C reference for a port",
                        description="Write a folder a port can be tested against: the test "
                                    "programme (main and key), the output and every stage's "
                                    "trace as raw float32 at two block sizes, a manifest, and "
                                    "a standalone C reference with a runner that compares "
                                    "itself (or your port) with the vectors.")
    _add_setup(pk)
    pk.add_argument("--out", required=True, metavar="DIR",
                    help="folder to write (new, or empty); required")
    pk.add_argument("--samplerate", type=float, default=48000.0,
                    help="Hz (default 48000)")
    pk.add_argument("--channels", type=int, default=2, choices=range(1, 9), metavar="N",
                    help="main channels, 1 to 8 (default 2)")
    pk.add_argument("--blocksize", type=int, action="append", metavar="N",
                    help="give twice: the two block sizes (default 64 and 1000 frames)")
    pk.add_argument("--wav", action="append", metavar="FILE.wav",
                    help="also run this file after the test programme (same rate; mono or "
                         "the kit's channels; its first channel keys), repeatable")
    pk.set_defaults(func=cmd_port_kit)

    pa = sub.add_parser("precision-audit", help="float32 against float64: what the single "
                                                "precision changes",
                        description="Run the same settings in float64 and in float32 over the "
                                    "synthesised test programme (and your WAV files) and "
                                    "report the largest and rms difference of the gain (dB) "
                                    "and the output (dBFS), where the gain differs most, and "
                                    "each stage's largest difference. Exit status 1 when the "
                                    "gain differs by more than the bound (0.01 dB).")
    _add_setup(pa)
    pa.add_argument("input", metavar="IN.wav", nargs="*",
                    help="also audit these files (after the test programme)")
    pa.add_argument("--key", metavar="KEY.wav",
                    help="key input for the files, when the algorithm takes one; default "
                         "none (the test programme brings its own key)")
    pa.add_argument("--samplerate", type=float, default=48000.0,
                    help="Hz of the test programme (default 48000)")
    pa.add_argument("--channels", type=int, default=2, choices=range(1, 9), metavar="N",
                    help="main channels of the test programme, 1 to 8 (default 2)")
    pa.add_argument("--every", action="store_true",
                    help="audit every shipped preset and every example algorithm file")
    pa.add_argument("--plot", metavar="FILE.png",
                    help="draw the differences over time (needs matplotlib); default none")
    pa.set_defaults(func=cmd_precision_audit)

    d = sub.add_parser("demo", help="the rehearsal demo: live ducking, then offline renders",
                       description="The built-in rehearsal scenario (drum loop, music bed, "
                                   "narrator), synthesised by livedyn: first live, the narrator "
                                   "ducking the music bed (headless when there is no soundcard), "
                                   "then offline through every shipped preset.")
    d.add_argument("--out", default="demo-out", metavar="DIR",
                   help="folder for the scenario, the renders and the live take (default "
                        "demo-out)")
    d.add_argument("--seconds", type=float, default=16.0, metavar="S",
                   help="length of the scenario and of the live part, s (default 16)")
    d.add_argument("--samplerate", type=int, default=48000, metavar="HZ",
                   help="sample rate, Hz (default 48000)")
    d.add_argument("--offline-only", action="store_true", help="skip the live part")
    d.add_argument("--headless", action="store_true",
                   help="run the live part on a JACK dummy server even if a soundcard exists")
    d.add_argument("--no-realtime", action="store_true",
                   help="do not ask for real-time scheduling or lock memory for the live part")
    d.set_defaults(func=cmd_demo)

    rn = sub.add_parser("run", help="run a processor live on a soundcard or headless",
                        description="Run a processor live. " + CAUTION)
    rn.add_argument("--device", metavar="D",
                    help="device index or name for both directions (livedyn devices); default "
                         "the system's default device")
    rn.add_argument("--input-device", metavar="D",
                    help="device index or name for input only; default as --device")
    rn.add_argument("--output-device", metavar="D",
                    help="device index or name for output only; default as --device")
    rn.add_argument("--samplerate", type=float, default=48000.0, metavar="HZ",
                    help="stream sample rate, Hz (default 48000)")
    rn.add_argument("--blocksize", type=int, default=64, metavar="N",
                    help="frames per callback, 16 to 8192 (default 64)")
    _add_setup(rn)
    rn.add_argument("--main-inputs", metavar="1,2",
                    help="device channels of the main input, from 1 (default 1,2)")
    rn.add_argument("--key-inputs", metavar="3",
                    help="device channels of the key input, from 1 (default none)")
    rn.add_argument("--outputs", metavar="1,2",
                    help="device channels that carry the output, from 1 (default 1,2)")
    rn.add_argument("--input-file", metavar="F",
                    help="play a WAV file as the main input (default: the device's inputs)")
    rn.add_argument("--key-file", metavar="F",
                    help="play a WAV file as the key input (default: the device's key inputs)")
    rn.add_argument("--test-main", metavar="KIND[:ARGS]",
                    help="a built-in test signal as the main input: tone[:HZ[:DBFS]], "
                         "pink[:DBFS], white[:DBFS], sweep[:F1[:F2[:SECONDS[:DBFS]]]], "
                         "bursts[:HZ[:HIGH[:LOW[:ON_MS[:OFF_MS]]]]] (never above -6 dBFS)")
    rn.add_argument("--test-key", metavar="KIND[:ARGS]",
                    help="a built-in test signal as the key input (same kinds; default none)")
    rn.add_argument("--picked", action="store_true",
                    help="use the devices and channels chosen with livedyn pick")
    rn.add_argument("--key-demo", action="store_true",
                    help="the rehearsal demo: the narrator ducks the music bed")
    rn.add_argument("--loop", action="store_true", help="loop file and demo inputs")
    rn.add_argument("--seconds", type=float, metavar="S",
                    help="stop after S seconds (default: until you quit; headless 10)")
    rn.add_argument("--record", metavar="DIR",
                    help="write main.wav, key.wav, out.wav and automation.txt here; default "
                         "none")
    rn.add_argument("--stats-json", metavar="FILE",
                    help="write the run's statistics here as JSON; default none")
    rn.add_argument("--monitor", choices=["out", "key", "delta"], default="out",
                    help="what the outputs carry: processed, filtered key, or what was removed "
                         "(default out)")
    rn.add_argument("--output-level", default=str(DEFAULT_OUTPUT_LEVEL_DB), metavar="DB",
                    help="level of the device outputs in dB, -60 to 0 or off (default "
                         f"{DEFAULT_OUTPUT_LEVEL_DB:g}: start low and raise it; meters and "
                         "recordings are taken before it)")
    rn.add_argument("--midi", metavar="PORT",
                    help="read MIDI control from this input port (index, name or a unique part "
                         "of it; livedyn devices lists them); default none")
    rn.add_argument("--midi-map", metavar="FILE", help="MIDI mappings to start with (TOML); default none")
    from .control.osc import DEFAULT_PORT as OSC_PORT

    rn.add_argument("--osc", type=int, nargs="?", const=OSC_PORT, metavar="PORT",
                    help=f"take OSC control on this UDP port (default {OSC_PORT}; on 127.0.0.1 "
                         "only unless --osc-bind)")
    rn.add_argument("--osc-bind", metavar="ADDRESS",
                    help="listen for OSC on this IPv4 address instead of 127.0.0.1 (0.0.0.0: "
                         "every interface); needs --osc-allow")
    rn.add_argument("--osc-allow", metavar="NET,...",
                    help="senders OSC accepts: addresses or networks (192.168.1.20, "
                         "192.168.1.0/24), comma-separated; default 127.0.0.0/8")
    rn.add_argument("--no-ui", action="store_true",
                    help="no console: print one status line a second (also when not on a "
                         "terminal)")
    rn.add_argument("--ui-refresh", type=float, default=20.0, metavar="HZ",
                    help="console meter refresh rate, Hz (default 20)")
    rn.add_argument("--headless", action="store_true",
                    help="start a JACK server with its dummy backend (no soundcard needed)")
    rn.add_argument("--loopback", action="store_true",
                    help="headless: patch the outputs back to the inputs (latency checks)")
    rn.add_argument("--watch", action="store_true",
                    help="reload the algorithm file when it changes, without a dropout")
    rtg = rn.add_mutually_exclusive_group()
    rtg.add_argument("--no-realtime", action="store_true",
                     help="do not ask for real-time scheduling nor lock memory (by default "
                          "livedyn asks for both where the system allows it)")
    rtg.add_argument("--realtime", action="store_true",
                     help="the default (kept so that older scripts still run)")
    rn.add_argument("--general-kernel", action="store_true",
                    help="keep the general kernel: do not compile and install the kernel "
                         "variant of the setting (by default livedyn does, off the audio "
                         "thread; the output is the same, the CPU time less)")
    rn.set_defaults(func=cmd_run)

    bn = sub.add_parser("bench", help="what an algorithm costs, stream headroom, swaps, latency",
                        description="Measure kernel cost, live-stream headroom, the cost of a "
                                    "live swap and round-trip latency (headless JACK server "
                                    "unless --device is given).")
    bn.add_argument("what", choices=["kernels", "stream", "swap", "latency", "all"],
                    help="kernels: cost per frame against plain-Python and plain-C twins and "
                         "bare-C loops, float64 and float32; "
                         "stream: the live callback's share of the block period; swap: what a "
                         "live swap costs; latency: round trip through a loopback; all: each")
    bn.add_argument("--quick", action="store_true", help="short runs for a smoke test")
    bn.add_argument("--precision", choices=("float64", "float32"), default=None,
                    help="kernels --algorithm FILE: time the file in this precision only "
                         "(default both)")
    bn.add_argument("--algorithm", default="compressor", metavar="NAME",
                    help="built-in name or FILE.py: kernels then times the file beside the "
                         "built-in compressor with the stages the file leaves out, in each "
                         "precision (default compressor)")
    bn.add_argument("--instances", type=int, default=1, metavar="K",
                    help="stream: instances of the algorithm in one callback (default 1)")
    bn.add_argument("--find-max", action="store_true",
                    help="raise K until blocks are late or the callback passes 70 %% load")
    bn.add_argument("--load", choices=["none", "python-thread", "compile", "all"], default="all",
                    help="interpreter load in the same process during the stream run "
                         "(default all: none, then each)")
    bn.add_argument("--seconds", type=float, metavar="S",
                    help="stream run length, s (default 60, --quick 5)")
    bn.add_argument("--repeats", type=int, default=5, metavar="N",
                    help="latency measurements (default 5)")
    bn.add_argument("--swaps", type=int, metavar="N",
                    help="live swaps to time, the algorithm to a fresh instance of itself "
                         "(default 20, quick 5)")
    bn.add_argument("--samplerate", type=float, default=48000.0, metavar="HZ",
                    help="live runs: sample rate, Hz (default 48000)")
    bn.add_argument("--blocksize", type=int, default=64, metavar="N",
                    help="live runs: frames per callback (default 64)")
    bn.add_argument("--device", metavar="D",
                    help="measure on this device (index or name) instead of a headless server; "
                         "default headless")
    bn.add_argument("--no-realtime", action="store_true",
                    help="do not ask for real-time scheduling (server and stream) nor lock "
                         "memory")
    bn.add_argument("--json", metavar="FILE",
                    help="also write every figure and the machine's details as JSON; default "
                         "none")
    bn.add_argument("--plot", metavar="DIR",
                    help="write PNG plots here (plot extra); default none")
    bn.add_argument("--wide", action="store_true",
                    help="kernels: every column (the default table fits 100 columns)")
    bn.set_defaults(func=cmd_bench)

    ck = sub.add_parser("check", help="compile and check an algorithm file, print the report",
                        description="Compile an algorithm file and run livedyn's load-time "
                                    "checks on it.")
    ck.add_argument("file", metavar="FILE.py", help="the algorithm file to check")
    ck.add_argument("--full", action="store_true", help="print the compiler's whole message")
    ck.set_defaults(func=cmd_check)

    na = sub.add_parser("new-algorithm", help="write a commented starting algorithm file",
                        description="Write NAME.py, a commented algorithm file to edit.")
    na.add_argument("name", metavar="NAME", help="file name (NAME.py) or path")
    na.add_argument("--stage", choices=["gain_curve", "detector", "smoother", "kernel"],
                    default="gain_curve",
                    help="which stage the file starts with (default gain_curve)")
    na.add_argument("--example", metavar="EXAMPLE",
                    help="start from a copy of a shipped example instead: loudness_ducker, "
                         "program_release or speech_key (default none)")
    na.set_defaults(func=cmd_new_algorithm)

    dv = sub.add_parser("devices", help="list audio devices", description="List audio devices.")
    dv.set_defaults(func=cmd_devices)

    rd = sub.add_parser("ready", help="can this machine run live at this block size?",
                        description="Check this machine before a show: real-time priority and "
                                    "locked-memory limits, CPU governor, kernel preemption, "
                                    "swap, sound devices in use, and how late a native "
                                    "real-time thread wakes at each block size. Changes "
                                    "nothing. Exit code 1 when an item fails.")
    rd.add_argument("--samplerate", type=float, default=48000.0, metavar="HZ",
                    help="sample rate the block sizes are judged at, Hz (default 48000)")
    rd.add_argument("--blocksize", type=int, default=64, metavar="N",
                    help="the block size to judge, frames (default 64; also measured beside 16 to 1024)")
    rd.add_argument("--seconds", type=float, default=2.0, metavar="S",
                    help="measurement time per block size (default 2)")
    rd.add_argument("--json", metavar="FILE",
                    help="also write the report as JSON ('-': JSON only, on stdout); default none")
    rd.set_defaults(func=cmd_ready)
    pk = sub.add_parser("pick", help="choose devices and main/key channels with a meter each",
                        description="Choose the input and output devices and the main and key "
                                    "input channels, with a meter per input channel; the choice "
                                    "is remembered for livedyn run --picked.")
    pk.add_argument("--headless", action="store_true",
                    help="pick on a JACK server of its own (dummy backend)")
    pk.add_argument("--channels", type=int, default=4, metavar="N",
                    help="headless: capture channels of the server (default 4)")
    pk.add_argument("--samplerate", type=float, default=48000.0, metavar="HZ",
                    help="headless: sample rate of the server, Hz (default 48000)")
    pk.set_defaults(func=cmd_pick)

    ps = sub.add_parser("presets", help="list the shipped presets, or show one",
                        description="List the shipped presets, or print one of them.")
    ps.add_argument("--show", metavar="NAME",
                    help="print this preset's file alone instead of the list")
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
