"""``python -m livedyn.bench kernels|ctwin [--quick] ...``: the kernel cost tables.

``kernels``: each built-in kernel against its plain-Python twin (and the plain-C twin where a
compiler exists), then the numba kernels against bare-C loops in float64 and float32 and a user
gain curve's own cost (:mod:`livedyn.bench.bare`); ``ctwin``: the numba kernels against the plain-C twins alone, both timed from
native block loops. ``livedyn bench`` runs the same harness with the live runs besides.
"""
from __future__ import annotations

import argparse
import json
import sys


def build_parser():
    ap = argparse.ArgumentParser(
        prog="python -m livedyn.bench",
        description="livedyn measurement harness. 'kernels': check each built-in algorithm's "
                    "numba kernel against its plain-Python twin, then time both.")
    sub = ap.add_subparsers(dest="command", required=True)
    k = sub.add_parser(
        "kernels", help="kernel cost per frame, times real time, Python call overhead, twin ratio",
        description="Check each built-in algorithm's kernel against its plain-Python twin on "
                    "seeded noise bursts, then time the kernel (numba-driven and per Python "
                    "call) and the twin. Table on stdout, progress on stderr.")
    k.add_argument("--quick", action="store_true", help="fewer repeats, shorter signals")
    k.add_argument("--json", metavar="FILE", help="also write machine info and rows as JSON")
    k.add_argument("--blocksize", metavar="N", type=int, action="append",
                   help="frames per block; repeat for several (default 64 and 1024)")
    k.add_argument("--channels", type=int, default=2, help="main channels (default 2)")
    k.add_argument("--samplerate", type=float, default=48000.0, help="Hz (default 48000)")
    k.add_argument("--seconds", type=float, default=None,
                   help="length of the timing signal in s (default 4, --quick 1)")
    k.add_argument("--wide", action="store_true",
                   help="every column (the default table fits 100 columns)")
    c = sub.add_parser(
        "ctwin", help="numba kernels against their plain-C twins",
        description="Compile the plain-C twins of the fused kernels, check that they agree "
                    "with the numba kernels bit for bit, and time both from native block loops.")
    c.add_argument("--quick", action="store_true", help="fewer repeats, shorter signals")
    c.add_argument("--blocksize", metavar="N", type=int, action="append",
                   help="frames per block; repeat for several (default 64 and 1024)")
    c.add_argument("--repeats", type=int, default=None, help="timed rounds (default 15)")
    c.add_argument("--seconds", type=float, default=None,
                   help="length of the timing signal in s (default 4)")
    c.add_argument("--wide", action="store_true",
                   help="also the [min-max] spreads (the default table fits 100 columns)")
    return ap


def _ctwin(args):
    from .kernels import run_ctwin

    try:
        rows = run_ctwin(quick=args.quick, blocksizes=tuple(args.blocksize or (64, 1024)),
                         repeats=args.repeats, seconds=args.seconds, wide=args.wide)
    except ValueError as exc:
        print(f"bench ctwin: {exc}", file=sys.stderr)
        return 2
    return 1 if any(r["c_check"] == "MISMATCH" for r in rows) else 0


def main(argv=None):
    args = build_parser().parse_args(argv)
    if args.command == "ctwin":
        return _ctwin(args)
    from .kernels import machine_info, report, run_kernels

    before = machine_info()
    blocksizes = tuple(args.blocksize) if args.blocksize else (64, 1024)
    try:
        rows = run_kernels(quick=args.quick, blocksizes=blocksizes, channels=args.channels,
                           samplerate=args.samplerate, seconds=args.seconds, wide=args.wide)
        precision = None
        if args.channels == 2:
            from .bare import run_precision

            precision = run_precision(quick=args.quick, blocksizes=blocksizes,
                                      samplerate=args.samplerate, wide=args.wide,
                                      seconds=args.seconds)
        else:
            print(f"(no bare-C table: its loops are stereo; --channels {args.channels})")
    except ValueError as exc:
        print(f"bench kernels: {exc}", file=sys.stderr)
        return 2
    if args.json:
        info = machine_info()
        info["load_average_at_start"] = before["load_average_1_5_15"]
        settings = dict(quick=args.quick, blocksizes=list(blocksizes), channels=args.channels,
                        samplerate=args.samplerate, seconds=args.seconds)
        doc = report(rows, info, settings, precision)
        with open(args.json, "w", encoding="utf-8") as f:
            json.dump(doc, f, indent=1, allow_nan=False)
            f.write("\n")
    bad = any(r["check"] != "ok" for r in rows) or (precision is not None
                                                    and not precision["ok"])
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
