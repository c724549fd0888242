"""The ``livedyn`` command: thin subcommands over the library.

Every user error ends in one line ``livedyn: error: ...`` and exit code 2; nothing is
overwritten by a command that fails.
"""
from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

EXIT_USAGE = 2

CAUTION = ("Caution: live monitoring can be loud. Start with the monitor level down, keep "
           "microphones away from loudspeakers (feedback), and follow the venue's rules.")


class CliError(Exception):
    pass


def _user_errors():
    from .params import ParamError
    from .wavio import WavError

    # OSError: any file-system failure (missing folder, a file where a folder should be, disk
    # full, ...) is the user's to fix and gets the one-line error too.
    return (ParamError, WavError, CliError, OSError)


def _check_target(path, option, protect=()):
    """Refuse a file to be written later (--summary-json, --json) before any work is done."""
    p = Path(path)
    for other in protect:
        if other is not None and p.resolve() == Path(other).resolve():
            raise CliError(f"{option} {path}: is one of the command's audio or automation "
                           "files; choose another name")
    if p.is_dir():
        raise CliError(f"{option} {path}: is a directory, expected a file path")
    if not p.parent.is_dir():
        raise CliError(f"{option} {path}: folder {p.parent} does not exist")


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

    if args.summary_json:
        _check_target(args.summary_json, "--summary-json",
                      (args.input, args.out, args.key, args.automation))
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

    if args.json:
        _check_target(args.json, "--json")
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
        if sq:
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


def cmd_demo(args):
    from . import demo
    from .render import Setup, render

    out = Path(args.out)
    _make_folder(out, "--out")
    print(f"Synthesising the rehearsal scenario ({args.seconds:g} s at {args.samplerate} Hz) "
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


# ---- parser ---------------------------------------------------------------------------------

def _add_setup(p):
    p.add_argument("--algorithm", metavar="NAME",
                   help="compressor, limiter, expander, gate or ducker")
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

    d = sub.add_parser("demo", help="synthesise the rehearsal scenario and process it",
                       description="Synthesise the built-in rehearsal scenario (drum loop, "
                                   "music bed, narrator) and process it with the shipped "
                                   "presets.")
    d.add_argument("--out", default="demo-out", metavar="DIR")
    d.add_argument("--seconds", type=float, default=16.0)
    d.add_argument("--samplerate", type=int, default=48000)
    d.set_defaults(func=cmd_demo)

    ps = sub.add_parser("presets", help="list the shipped presets",
                        description="List the shipped presets.")
    ps.add_argument("--show", metavar="NAME", help="print one preset")
    ps.set_defaults(func=cmd_presets)
    return ap


def main(argv=None):
    ap = build_parser()
    args = ap.parse_args(argv)
    if not getattr(args, "func", None):
        ap.print_help()
        return EXIT_USAGE
    from . import dsp

    dsp.announce = dsp.announce_on_stderr
    try:
        return args.func(args)
    except _user_errors() as e:
        msg = str(e).splitlines()[0] if str(e) else type(e).__name__
        if isinstance(e, OSError) and e.filename:
            msg = f"{e.filename}: {e.strerror}"
        print(f"livedyn: error: {msg}", file=sys.stderr)
        return EXIT_USAGE
    except KeyboardInterrupt:
        print("livedyn: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
