"""Offline render: a WAV file through the same Processor the live engine runs, block by block.

Memory stays bounded whatever the file length: input, key, output and traces are streamed.
By default the output is aligned with the input (the processor's latency is taken off the front
and the tail is flushed with silence), so OUT.wav lines up with IN.wav; ``keep_latency=True``
writes the stream exactly as a live run would produce it. The latency compensated is the one
the processor has at the start: automation that changes the lookahead moves the output after
that change by the difference.
"""
from __future__ import annotations

import json
import math
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import loader
from . import presets as presets_mod
from .automation import Automation, AutomationCursor
from .files import write_text_atomic
from .dsp.layout import TRACE_NAMES
from .meters import MeterSet
from .params import KEY_EXTERNAL, LEVEL_FLOOR_DB, P_KEY, ParamError
from .processor import Processor
from .wavio import WavReader, WavWriter

DEFAULT_BLOCKSIZE = 1024


class RenderError(ParamError):
    """A render that cannot start or finish; one line for the user."""


@dataclass
class Setup:
    """What to run: algorithm, preset values, then individual settings (applied in that order)."""

    algorithm: str | None = None
    preset: str | None = None
    settings: list = field(default_factory=list)  # [(name, value text)]
    precision: str | None = None  # "float64" or "float32" (also --set precision=...)

    def chosen_precision(self):
        """The precision asked for: the last ``precision=`` setting, else ``precision``, else
        float64 (ParamError, one line, for anything else)."""
        from .dsp.precision import check

        p = self.precision
        for name, value in self.settings:
            if name.strip().lower() == "precision":
                p = value
        return check(p or "float64")


def parse_setting(text):
    """'name=value' -> (name, value)."""
    name, sep, value = str(text).partition("=")
    if not sep or not name.strip() or not value.strip():
        raise RenderError(f"--set {text!r}: expected name=value, e.g. threshold=-18")
    return name.strip(), value.strip()


#: Where ``algorithm_of`` says which algorithm file a preset is about to run (a callable
#: taking one line, or None); the command line points it at standard output.
announce = None
_announced = set()


def algorithm_of(setup: Setup, preset=None) -> str:
    """The algorithm (a built-in name or a file's path) that a Setup and its loaded preset
    name; RenderError when --algorithm and the preset disagree. A preset naming an algorithm
    file is announced (:data:`announce`) before the file is loaded: its code will run."""
    algo = setup.algorithm
    if preset is not None:
        if preset.algorithm_file is not None:
            if announce is not None and preset.algorithm_file not in _announced:
                _announced.add(preset.algorithm_file)
                announce(f"preset {setup.preset} runs the algorithm file "
                         f"{preset.algorithm_file} (Python code, with your permissions)")
            user = loader.get(str(preset.algorithm_file))
            preset.checked(user.schema)
            if algo and Path(algo).resolve() != Path(preset.algorithm_file).resolve():
                raise RenderError(f"--algorithm {algo} conflicts with preset {setup.preset} "
                                  f"(algorithm_file {preset.algorithm_file}); give one")
            algo = str(preset.algorithm_file)
        else:
            if algo and loader.get(algo).name != preset.algorithm:
                raise RenderError(
                    f"--algorithm {algo} conflicts with preset {setup.preset} "
                    f"(algorithm {preset.algorithm}); give one or make them agree")
            algo = preset.algorithm
    return algo or "compressor"


def build_processor(setup: Setup, samplerate, channels, key_channels=0,
                    strict_key=False) -> Processor:
    """A Processor from an algorithm name and/or a preset, then --set values.

    Without key channels a key = external (the algorithm's default or the preset's) falls back
    to the main input; with ``strict_key`` that raises RenderError instead (a render without
    the key file its setting asks for). Key channels for an algorithm without a key input
    raise RenderError.
    """
    preset = presets_mod.load(setup.preset) if setup.preset else None
    precision = setup.chosen_precision()  # structural: it chooses the kernel, not a value
    proc = Processor(loader.get(algorithm_of(setup, preset), precision), samplerate, channels,
                     key_channels=key_channels, precision=precision)
    if key_channels and "key" not in proc.schema:
        raise RenderError(f"--key: the {proc.algorithm.name} has no key input; leave out "
                          "--key or choose an algorithm with one")
    wants_external = "key" in proc.schema and int(proc.schema["key"].default) == KEY_EXTERNAL
    if key_channels and "key" in proc.schema:
        proc.set("key", "external")
    if preset is not None:
        for name, v in preset.values.items():
            if name == "key":
                wants_external = int(v) == KEY_EXTERNAL
                if key_channels == 0 and wants_external:
                    continue  # no key input here: stay on the main input
            proc.set(name, v)
    for name, value in setup.settings:
        if name.strip().lower() == "precision":
            continue  # chosen above
        name = proc.schema.resolve(name)  # a unique prefix, as at the console
        proc.set(name, value)
        if name == "key":
            wants_external = int(proc.p[P_KEY]) == KEY_EXTERNAL
    if strict_key and key_channels == 0 and wants_external:
        raise RenderError(f"{proc.algorithm.name} is set to key = external but no --key "
                          "file was given (or use --set key=main)")
    return proc


@dataclass
class Summary:
    input: str
    output: str
    algorithm: str
    samplerate: float
    channels: int
    frames: int
    latency_samples: int
    latency_compensated: bool
    gain_reduction_max_db: float
    gain_reduction_mean_db: float
    reduced_share: float  # share of the time with more than 1 dB of gain reduction
    input_meters: dict
    output_meters: dict
    nonfinite_inputs: int
    seconds: float
    automation_events: int = 0
    parameters: dict = field(default_factory=dict)
    notes: list = field(default_factory=list)  # one line each: how the key was adapted
    #: Output blocks that held a non-finite sample and were written as silence (the last
    #: safety stage, as live)
    muted_blocks: int = 0
    muted_frames: int = 0

    def as_dict(self):
        return dict(self.__dict__)

    def lines(self):
        def f(v, unit):
            if isinstance(v, (list, tuple)):
                v = max(v) if v else None
            # the meters read silence as LEVEL_FLOOR_DB, which is not a level to print
            return "-inf" if v is None or math.isinf(v) or v <= LEVEL_FLOOR_DB else \
                f"{v:.1f} {unit}"

        dur = self.frames / self.samplerate
        i, o = self.input_meters, self.output_meters
        yield f"{self.algorithm}: {Path(self.input).name} -> {Path(self.output).name}, " \
              f"{dur:.1f} s, {self.channels} ch, {self.samplerate:g} Hz, " \
              f"{dur / max(self.seconds, 1e-9):.0f}x real time"
        yield f"  {'':20}{'input':>12}{'output':>12}"
        yield f"  {'integrated loudness':20}{f(i['integrated_lufs'], 'LUFS'):>12}" \
              f"{f(o['integrated_lufs'], 'LUFS'):>12}"
        yield f"  {'max short-term':20}{f(i['max_short_term_lufs'], 'LUFS'):>12}" \
              f"{f(o['max_short_term_lufs'], 'LUFS'):>12}"
        yield f"  {'true peak':20}{f(i['max_true_peak_dbtp'], 'dBTP'):>12}" \
              f"{f(o['max_true_peak_dbtp'], 'dBTP'):>12}"
        yield f"  {'sample peak':20}{f(i['max_peak_dbfs'], 'dBFS'):>12}" \
              f"{f(o['max_peak_dbfs'], 'dBFS'):>12}"
        yield f"  gain reduction: max {self.gain_reduction_max_db:.1f} dB, mean " \
              f"{self.gain_reduction_mean_db:.1f} dB, above 1 dB for " \
              f"{100 * self.reduced_share:.0f} % of the time"
        comp = "compensated" if self.latency_compensated else "kept in the output"
        yield f"  latency {self.latency_samples} samples " \
              f"({1000 * self.latency_samples / self.samplerate:.2f} ms, {comp})"
        if self.nonfinite_inputs:
            yield f"  {self.nonfinite_inputs} non-finite input samples were replaced by 0"
        for note in self.notes:
            yield f"  note: {note}"
        if self.muted_blocks:
            yield (f"  {self.muted_blocks} output blocks ({self.muted_frames} frames) held "
                   "non-finite samples and were muted")


class _KeyAlongside:
    """A key file made to run alongside the main input: resampled to the main rate with
    ``scipy.signal.resample_poly`` when its rate differs (then held in memory, as the
    polyphase filter needs the whole signal), padded with silence or trimmed to the main
    input's length. ``notes`` says what was done, one line each."""

    def __init__(self, reader, key_path, fs, frames):
        self.channels = reader.channels
        self.samplerate = fs
        self.frames = frames
        self.notes = []
        self._reader = reader
        self._data = None
        kfs, kframes = reader.samplerate, reader.frames
        if kfs != fs:
            from fractions import Fraction

            from scipy.signal import resample_poly

            ratio = Fraction(int(round(fs)), int(round(kfs))).limit_denominator(10000)
            data = reader.read().astype(np.float64)
            self._data = np.ascontiguousarray(
                resample_poly(data, ratio.numerator, ratio.denominator, axis=0),
                dtype=np.float32)
            self.notes.append(f"key {Path(key_path).name}: {kfs:g} Hz resampled to {fs:g} Hz "
                              f"(scipy.signal.resample_poly, up {ratio.numerator}, down "
                              f"{ratio.denominator})")
            kframes = self._data.shape[0]
        if kframes < frames:
            self.notes.append(f"key {Path(key_path).name}: {kframes} frames, padded with "
                              f"{frames - kframes} frames of silence to the input's {frames}")
        elif kframes > frames:
            self.notes.append(f"key {Path(key_path).name}: {kframes} frames, its last "
                              f"{kframes - frames} trimmed to the input's {frames}")

    def blocks(self, n):
        """Blocks of the main input's sizes (``n`` frames, the last one shorter)."""
        src = iter(()) if self._data is not None else self._reader.blocks(n)
        pos = 0
        held = np.zeros((0, self.channels), np.float32)
        while pos < self.frames:
            want = min(n, self.frames - pos)
            if self._data is not None:
                block = self._data[pos:pos + want]
            else:
                while held.shape[0] < want:
                    more = next(src, None)
                    if more is None:
                        break
                    held = np.concatenate([held, more]) if held.shape[0] else more
                block, held = held[:want], held[want:]
            if block.shape[0] < want:
                block = np.concatenate(
                    [block, np.zeros((want - block.shape[0], self.channels), np.float32)])
            pos += want
            yield np.ascontiguousarray(block)

    def close(self):
        self._reader.close()


class _Progress:
    """A one-line progress bar on stderr for long files (only on a terminal)."""

    def __init__(self, total, label, min_frames):
        self.total = total
        self.label = label
        self.on = total >= min_frames and sys.stderr.isatty()
        self.last = -1

    def update(self, done):
        if not self.on:
            return
        pct = int(100 * done / max(self.total, 1))
        if pct != self.last:
            self.last = pct
            bar = "#" * (pct // 4)
            print(f"\r{self.label} [{bar:<25}] {pct:3d} %", end="", file=sys.stderr, flush=True)

    def close(self):
        if self.on:
            print(file=sys.stderr)


class _TraceWriter:
    """Per-stage traces as float WAV files, one file a stage (columns = channels)."""

    def __init__(self, folder: Path, samplerate, proc: Processor, key_channels):
        try:
            folder.mkdir(parents=True, exist_ok=True)
        except OSError as e:
            raise RenderError(f"--trace {folder}: cannot make the folder "
                              f"({e.strerror or e}), expected a folder for the trace files"
                              ) from None
        self.folder = folder
        self.writers = {}
        ngain = proc.channels if proc.describe().get("link") == "none" else 1
        widths = {"input": proc.channels, "output": proc.channels}
        if key_channels:
            widths["key"] = key_channels
        for i, name in enumerate(TRACE_NAMES):
            widths[name] = (key_channels or proc.channels) if i == 0 else ngain
        if proc.algorithm.kind == "limiter":
            widths[TRACE_NAMES[0]] = ngain
        for name, width in widths.items():
            self.writers[name] = WavWriter(folder / f"{name}.wav", int(samplerate), width, "FLOAT")

    def write(self, name, block):
        self.writers[name].write(np.ascontiguousarray(block, dtype=np.float32))

    def close(self, info: dict):
        for w in self.writers.values():
            w.close()
        text = json.dumps(info, indent=2, default=float)
        write_text_atomic(self.folder / "trace.json", text + "\n")

    def abort(self):
        for w in self.writers.values():
            w.abort()


#: Suffixes ``render`` writes under: WAV data under any other name would mislead every program
#: that goes by the name (FLAC and the rest are refused, not written as WAV).
OUT_SUFFIXES = (".wav", ".wave")


def render(in_path, out_path, setup: Setup, key_path=None, automation_path=None, trace_dir=None,
           blocksize=DEFAULT_BLOCKSIZE, keep_latency=False, subtype=None,
           progress_min_seconds=30.0, safety_ceiling_db=None, layout=None) -> Summary:
    """Render ``in_path`` through the configured processor into ``out_path``.

    Raises RenderError / ParamError / WavError with a one-line message; on any error the output
    file (and an existing file of that name) is left as it was.

    ``safety_ceiling_db`` applies the live engine's last stage (non-finite samples mute their
    block, then the ceiling) to every block, so that a live recording can be compared with a
    render sample for sample.

    ``layout`` names the channel layout of the loudness figures (BS.1770-4 channel weights,
    ``livedyn.dsp.loudness.LAYOUTS``); by default the channel count decides.
    """
    if isinstance(blocksize, bool) or int(blocksize) != blocksize or not 1 <= blocksize <= 65536:
        raise RenderError(f"--blocksize {blocksize!r}: expected a whole number from 1 to 65536")
    suffix = Path(out_path).suffix
    if suffix.lower() not in OUT_SUFFIXES:
        raise RenderError(f"--out {out_path}: livedyn writes WAV (RF64 past 4 GiB), expected a "
                          f"name ending in .wav, not {suffix or 'no suffix'}")
    blocksize = int(blocksize)
    others = ((in_path, "input"), (key_path, "key"), (automation_path, "automation"))
    for other, what in others:
        if other is not None and Path(out_path).resolve() == Path(other).resolve():
            raise RenderError(f"--out {out_path}: is the {what} file; choose another name")
    if trace_dir is not None:
        for stem in ("input", "output", "key", *TRACE_NAMES):
            t = (Path(trace_dir) / f"{stem}.wav").resolve()
            for other, what in (*others, (out_path, "output")):
                if other is not None and t == Path(other).resolve():
                    raise RenderError(f"--trace {trace_dir}: its {t.name} would replace the "
                                      f"{what} file; choose another folder")
    t0 = time.perf_counter()
    with WavReader(in_path) as src:
        fs, ch, frames = src.samplerate, src.channels, src.frames
        key = None
        kch = 0
        notes = []
        if key_path is not None:
            reader = WavReader(key_path)
            try:
                key = _KeyAlongside(reader, key_path, fs, frames)
            except BaseException:
                reader.close()
                raise
            notes = key.notes
            kch = key.channels
        try:
            proc = build_processor(setup, fs, ch, kch, strict_key=True)
            auto = None
            if automation_path is not None:
                auto = Automation.load(automation_path, proc.schema)
                if auto.samplerate != fs:
                    raise RenderError(f"{automation_path}: recorded at {auto.samplerate:g} Hz, "
                                      f"expected {fs} Hz like {in_path}")
            summary = _run(src, key, proc, auto, in_path, out_path, trace_dir, blocksize,
                           keep_latency, subtype or _output_subtype(src.subtype), t0,
                           progress_min_seconds, safety_ceiling_db, layout)
            summary.notes = list(notes)
            return summary
        finally:
            if key is not None:
                key.close()


def _output_subtype(in_subtype):
    return in_subtype if in_subtype in ("PCM_16", "PCM_24", "PCM_32", "FLOAT") else "FLOAT"


def _run(src, key, proc, auto, in_path, out_path, trace_dir, blocksize, keep_latency, subtype,
         t0, progress_min_seconds, safety_ceiling_db=None, layout=None):
    fs, ch, frames = src.samplerate, src.channels, src.frames
    kch = key.channels if key is not None else 0
    lat = 0 if keep_latency else proc.latency_samples
    meters_in = MeterSet(fs, ch, layout=layout)
    meters_out = MeterSet(fs, ch, layout=layout)
    cursor = AutomationCursor(auto)
    tracer = _TraceWriter(Path(trace_dir), fs, proc, kch) if trace_dir else None
    prog = _Progress(frames, f"rendering {Path(in_path).name}", progress_min_seconds * fs)
    gr_sum = 0.0
    gr_max = 0.0
    reduced = 0
    to_skip = lat
    pos = 0
    key_blocks = key.blocks(blocksize) if key is not None else None
    safety = None
    if safety_ceiling_db is not None:
        from .dsp.abi import F_CEIL, F_GAIN, F_TARGET, SAFE_SIZE, STATS_SIZE, safety_stage

        safe = np.zeros(SAFE_SIZE)
        safe[F_GAIN] = safe[F_TARGET] = 1.0
        safe[F_CEIL] = 10 ** (safety_ceiling_db / 20)
        safety_stats = np.zeros(STATS_SIZE, np.int64)

        def safety(y):
            safety_stage(y, len(y), y.shape[1], safe, 0, safety_stats)
            return y
    muted = [0, 0]  # blocks, frames

    def last_stage(y):
        # always on, as live: a block holding a NaN or an infinity is written as silence
        if not np.isfinite(y).all():
            y = np.zeros_like(y)
            muted[0] += 1
            muted[1] += len(y)
        return y

    try:
        with WavWriter(out_path, int(fs), ch, subtype, frames_hint=frames) as out:
            def emit(y):
                nonlocal to_skip
                y = last_stage(y)
                if to_skip:
                    cut = min(to_skip, len(y))
                    y = y[cut:]
                    to_skip -= cut
                if len(y):
                    meters_out.process(y)
                    out.write(y)

            def run_block(x, k, start, stop):
                nonlocal gr_sum, gr_max, reduced
                ys = []
                for s0, s1, due in cursor.split(start, stop):
                    for _, name, value in due:
                        proc.set(name, value)
                    xs = x[s0 - start:s1 - start]
                    ks = None if k is None else k[s0 - start:s1 - start]
                    y, tr = proc.process_traced(xs, ks)
                    g = tr["gain_db"]
                    gmin = g.min(axis=1) if g.shape[1] else np.zeros(len(xs))
                    gr_sum += float(-gmin.sum())
                    gr_max = max(gr_max, float(-gmin.min()) if len(gmin) else 0.0)
                    reduced += int(np.count_nonzero(gmin < -1.0))
                    if tracer is not None:
                        tracer.write("input", xs)
                        if ks is not None:
                            tracer.write("key", ks)
                        for name in TRACE_NAMES:
                            tracer.write(name, tr[name])
                        tracer.write("output", y)
                    ys.append(y)
                y = ys[0] if len(ys) == 1 else np.concatenate(ys)
                emit(safety(y) if safety is not None else y)

            for x in src.blocks(blocksize):
                k = next(key_blocks) if key_blocks is not None else None
                meters_in.process(x)
                run_block(x, k, pos, pos + len(x))
                pos += len(x)
                prog.update(pos)
            # flush the latency with silence so nothing is cut off the end
            tail = lat
            while tail > 0:
                n = min(tail, blocksize)
                z = np.zeros((n, ch), np.float32)
                kz = np.zeros((n, kch), np.float32) if kch else None
                run_block(z, kz, pos, pos + n)
                pos += n
                tail -= n
            if tracer is not None:
                tracer.close({
                    "algorithm": proc.algorithm.name,
                    "samplerate": fs,
                    "latency_samples": proc.latency_samples,
                    "parameters": proc.describe(),
                    "files": {n: f"{n}.wav" for n in tracer.writers},
                    "note": "all traces are sample-aligned with input.wav; output.wav is the raw "
                            "stream (delayed by latency_samples); dB traces are in dB",
                })
                tracer = None
    except BaseException:
        if tracer is not None:
            tracer.abort()
        raise
    finally:
        prog.close()
    total = max(pos, 1)
    return Summary(
        input=str(in_path), output=str(out_path), algorithm=proc.algorithm.name,
        samplerate=fs, channels=ch, frames=frames, latency_samples=proc.latency_samples,
        latency_compensated=not keep_latency, gain_reduction_max_db=gr_max,
        gain_reduction_mean_db=gr_sum / total, reduced_share=reduced / total,
        input_meters=meters_in.snapshot(), output_meters=meters_out.snapshot(),
        nonfinite_inputs=proc.nonfinite_count, seconds=time.perf_counter() - t0,
        automation_events=len(auto) if auto is not None else 0, parameters=proc.describe(),
        muted_blocks=muted[0], muted_frames=muted[1],
    )
