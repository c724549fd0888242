"""MIDI control: ports, mappings (with their file), learn, soft takeover.

A :class:`MidiControl` reads one MIDI input port on its own thread and turns control changes
(7-bit, and 14-bit MSB/LSB pairs), notes and program changes into parameter values and actions
through a :class:`livedyn.control.hub.Controls` (coalesced, at most one publication per block).

Ports come from python-rtmidi, opened without a callback and polled: rtmidi calls a callback
from its own MIDI thread, which for JACK is the server's process thread, and a Python callback
there would take the interpreter lock inside the audio cycle of the whole JACK graph. (mido's
rtmidi backend always installs such a callback, so livedyn uses mido only to parse the bytes.)

A mapping follows the parameter's taper (:mod:`livedyn.control.taper`) within a range the user
may narrow, with soft takeover: a control whose position differs from the parameter's value
moves nothing until it passes that value, so a knob left elsewhere makes no jump.

Mapping file (``mapping_format = 1``, TOML, livedyn's own layout)::

    mapping_format = 1
    [[map]]
    target = "threshold"   # a parameter, output_level, mute, bypass, slot, compare or
                           # "preset NAME"
    control = "cc"         # cc (7-bit), cc14 (MSB number 0-31 with LSB number + 32), note,
                           # program
    channel = 1            # 1-16, or 0 for any channel
    number = 21            # controller, note or program number (0-127)
    range = [-40, 0]       # optional: narrower range, in the parameter's unit
    mode = "toggle"        # notes: toggle (each press flips) or momentary (on while held)

References
----------
MIDI 1.0 Detailed Specification (MIDI Manufacturers Association): control change numbers 0-31
as MSB with 32-63 as their LSB; a new MSB clears the LSB (recalled from memory).
"""
from __future__ import annotations

import math
import threading
import time
import tomllib
from dataclasses import dataclass
from pathlib import Path

import mido

from ..params import ParamError
from . import taper
from .hub import ACTIONS

#: Soft takeover: a control within this share of the range of the value takes it over.
TAKEOVER = 0.02
#: Learn: after a controller 0-31 moves, wait this long for its LSB (n + 32) before
#: mapping it as 7-bit.
LEARN_PAIR_S = 0.25
MAPPING_FORMAT = 1
CONTROLS = ("cc", "cc14", "note", "program")
MODES = ("toggle", "momentary")


class MidiError(ParamError):
    """A port or mapping that cannot be used; one line."""


# ---- ports -----------------------------------------------------------------------------------

def _rtmidi():
    try:
        import rtmidi
    except ImportError as e:  # pragma: no cover - a dependency
        raise MidiError(f"MIDI needs python-rtmidi ({e})") from None
    return rtmidi


def _apis():
    rt = _rtmidi()
    have = rt.get_compiled_api()
    return [(a, rt.get_api_name(a)) for a in (rt.API_UNIX_JACK, rt.API_LINUX_ALSA,
                                              rt.API_MACOSX_CORE, rt.API_WINDOWS_MM)
            if a in have]


def list_ports():
    """MIDI input ports of every MIDI system that answers: dicts of api, index, name."""
    rt = _rtmidi()
    out = []
    for api, api_name in _apis():
        try:
            mi = rt.MidiIn(api, name="livedyn-list")
        except Exception:  # that system is not running here
            continue
        try:
            for i, name in enumerate(mi.get_ports()):
                out.append({"api": api_name, "index": i, "name": name})
        finally:
            mi.delete()
    return out


def open_port(port, client="livedyn"):
    """Open the input port ``port`` (its index in :func:`list_ports` order, an exact name, or
    a unique part of a name). Returns ``(rtmidi.MidiIn, "api: name")``."""
    ports = list_ports()
    if not ports:
        raise MidiError(f"--midi {port}: no MIDI input ports (no JACK server or ALSA sequencer "
                        "answers here)")
    text = str(port)
    hits = [p for p in ports if p["name"] == text]
    if not hits and text.isdigit() and int(text) < len(ports):
        hits = [ports[int(text)]]
    if not hits:
        hits = [p for p in ports if text.lower() in p["name"].lower()]
    if len(hits) != 1:
        names = "; ".join(f"{i}: {p['name']}" for i, p in enumerate(ports))
        what = "matches no" if not hits else "matches more than one"
        raise MidiError(f"--midi {port}: {what} MIDI input port, expected one of {names}")
    p = hits[0]
    rt = _rtmidi()
    api = {n: a for a, n in _apis()}[p["api"]]
    mi = rt.MidiIn(api, name=client, queue_size_limit=4096)
    names = mi.get_ports()
    mi.open_port(names.index(p["name"]), name="in")
    mi.ignore_types(sysex=True, timing=True, active_sense=True)
    return mi, f"{p['api']}: {p['name']}"


# ---- mappings --------------------------------------------------------------------------------

@dataclass
class Mapping:
    """One control driving one target (see the module docstring for the fields)."""

    target: str
    control: str
    channel: int
    number: int
    lo: float | None = None
    hi: float | None = None
    mode: str = "toggle"

    def key(self):
        return (self.control, self.channel, self.number)

    def label(self) -> str:
        ch = f"/{self.channel}" if self.channel else ""
        return {"cc": f"cc{self.number}", "cc14": f"cc{self.number}+{self.number + 32}",
                "note": f"n{self.number}", "program": f"pc{self.number}"}[self.control] + ch

    def check(self, where="mapping"):
        if self.control not in CONTROLS:
            raise MidiError(f"{where}: control = {self.control!r}, expected one of "
                            f"{', '.join(CONTROLS)}")
        top = 31 if self.control == "cc14" else 127
        if not (isinstance(self.number, int) and 0 <= self.number <= top):
            raise MidiError(f"{where}: number = {self.number!r}, expected 0 to {top} for "
                            f"{self.control}")
        if not (isinstance(self.channel, int) and 0 <= self.channel <= 16):
            raise MidiError(f"{where}: channel = {self.channel!r}, expected 1 to 16 (0: any)")
        if self.mode not in MODES:
            raise MidiError(f"{where}: mode = {self.mode!r}, expected one of {', '.join(MODES)}")
        return self


def load_mappings(path):
    """Read a mapping file; raises MidiError with one line naming the file and the entry."""
    from ..presets import read_text_file

    name = str(path)
    text = read_text_file(path, MidiError, "MIDI mapping")
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise MidiError(f"{name}: invalid TOML: {' '.join(str(e).split())}") from None
    if doc.get("mapping_format") != MAPPING_FORMAT:
        raise MidiError(f"{name}: mapping_format = {doc.get('mapping_format')!r}, expected "
                        f"{MAPPING_FORMAT}")
    unknown = set(doc) - {"mapping_format", "map"}
    if unknown:
        raise MidiError(f"{name}: unknown key {sorted(unknown)[0]!r}, expected mapping_format "
                        "and [[map]] entries")
    out = []
    for i, e in enumerate(doc.get("map", []), 1):
        where = f"{name}: map {i}"
        if not isinstance(e, dict):
            raise MidiError(f"{where}: expected a table")
        extra = set(e) - {"target", "control", "channel", "number", "range", "mode"}
        if extra:
            raise MidiError(f"{where}: unknown key {sorted(extra)[0]!r}")
        rng = e.get("range")
        if rng is not None and not (isinstance(rng, list) and len(rng) == 2 and
                                    all(isinstance(v, (int, float)) and not isinstance(v, bool)
                                        for v in rng)):
            raise MidiError(f"{where}: range = {rng!r}, expected [low, high] in the "
                            "parameter's unit")
        target = e.get("target")
        if not isinstance(target, str) or not target.strip():
            raise MidiError(f"{where}: target = {target!r}, expected a parameter or action name")
        m = Mapping(target.strip(), e.get("control", "cc"), e.get("channel", 0),
                    e.get("number"), None if rng is None else float(rng[0]),
                    None if rng is None else float(rng[1]), e.get("mode", "toggle"))
        out.append(m.check(where))
    return out


def dumps_mappings(mappings) -> str:
    import tomli_w

    entries = []
    for m in mappings:
        e = {"target": m.target, "control": m.control, "channel": m.channel,
             "number": m.number}
        if m.lo is not None or m.hi is not None:
            e["range"] = [m.lo, m.hi]
        if m.control in ("note", "program"):
            e["mode"] = m.mode
        entries.append(e)
    return ("# livedyn MIDI mappings (see livedyn/control/midi.py for the layout)\n"
            + tomli_w.dumps({"mapping_format": MAPPING_FORMAT, "map": entries}))


def save_mappings(mappings, path) -> Path:
    from ..presets import write_text_atomic

    target = Path(path).expanduser()
    if target.suffix == "":
        target = target.with_name(target.name + ".toml")
    if not target.parent.is_dir():
        raise MidiError(f"{target}: folder {target.parent} does not exist")
    try:
        write_text_atomic(target, dumps_mappings(mappings))
    except OSError as e:
        raise MidiError(f"{target}: cannot write: {e.strerror or e}") from None
    return target


def coalesce(batch):
    """The messages of ``batch`` (raw, in arrival order) worth handling: of several control
    changes of one controller on one channel only the last (a later value replaces an earlier
    one, as the publication would anyway); notes, programs and the rest all, in order."""
    last = {}
    for i, d in enumerate(batch):
        if len(d) == 3 and 0xB0 <= d[0] <= 0xBF:
            last[(d[0], d[1])] = i
    if len(last) == sum(1 for d in batch if len(d) == 3 and 0xB0 <= d[0] <= 0xBF):
        return batch
    return [d for i, d in enumerate(batch)
            if not (len(d) == 3 and 0xB0 <= d[0] <= 0xBF) or last[(d[0], d[1])] == i]


# ---- the reader ------------------------------------------------------------------------------

class MidiControl:
    """Read one MIDI input port on a thread of its own and drive ``controls``.

    Parameters
    ----------
    controls : livedyn.control.hub.Controls
    port : rtmidi.MidiIn, optional
        An opened input (see :func:`open_port`); without one, :meth:`feed` takes raw messages
        (what the thread does with each message it reads).
    mappings : list of Mapping
    """

    def __init__(self, controls, port=None, mappings=(), port_name=""):
        self.controls = controls
        self.port = port
        self.port_name = port_name
        self.mappings = list(mappings)
        self.learning = None  # target being learned
        self._candidate = None  # (Mapping, time) of a learned 0-31 controller awaiting its LSB
        self._msb = {}  # (channel, number) -> MSB of 14-bit controllers
        self._lsb = {}
        self._picked = {}  # mapping key -> soft takeover state: [picked, last position, sent]
        self._held = {}
        self.received = 0
        self.malformed = 0
        self.waiting = 0  # control moves ignored by soft takeover
        self._stop = threading.Event()
        self._thread = None
        self._lock = threading.Lock()
        controls.midi = self

    # ---- thread --------------------------------------------------------------------------------
    def start(self):
        if self.port is not None and self._thread is None:
            self._thread = threading.Thread(target=self._run, name="livedyn-midi", daemon=True)
            self._thread.start()
        return self

    def stop(self):
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=2.0)
            self._thread = None
        if self.port is not None:
            try:
                self.port.close_port()
                self.port.delete()
            except Exception:
                pass
            self.port = None

    def _run(self):
        port = self.port
        while not self._stop.is_set():
            batch = []
            while len(batch) < 4096:
                try:
                    m = port.get_message()
                except Exception:
                    m = None
                if m is None:
                    break
                batch.append(m[0])
            for data in coalesce(batch):
                self.feed(data)
            self.received += len(batch) - len(batch and coalesce(batch))
            self._learn_timeout()
            if not batch:
                self._stop.wait(0.0005)

    # ---- messages ------------------------------------------------------------------------------
    def feed(self, data):
        """Handle one raw MIDI message (a list of bytes); never raises."""
        self.received += 1
        try:
            msg = mido.Message.from_bytes(list(data))
        except Exception:
            self.malformed += 1
            return
        try:
            self._handle(msg)
        except Exception as e:  # a message must never stop the reader
            self.controls.notice("warn", f"MIDI {msg}: {str(e).splitlines()[0]}")

    def _handle(self, msg):
        ch = getattr(msg, "channel", 0) + 1
        if msg.type == "control_change":
            n, v = msg.control, msg.value
            if self.learning is not None:
                self._learn_cc(ch, n)
                return
            if n < 32:
                self._msb[(ch, n)] = v
                self._lsb[(ch, n)] = 0  # a new MSB clears the LSB
            elif n < 64:
                self._lsb[(ch, n - 32)] = v
            for m in self._matching(ch, n):
                if m.control == "cc14":
                    b = m.number
                    pos = ((self._msb.get((ch, b), 0) << 7) | self._lsb.get((ch, b), 0)) / 16383.0
                else:
                    pos = v / 127.0
                self._drive(m, pos, continuous=True)
        elif msg.type in ("note_on", "note_off"):
            down = msg.type == "note_on" and msg.velocity > 0
            if self.learning is not None:
                if down:
                    self._learned(Mapping(self.learning, "note", ch, msg.note))
                return
            for m in self._find("note", ch, msg.note):
                self._note(m, down)
        elif msg.type == "program_change":
            if self.learning is not None:
                self._learned(Mapping(self.learning, "program", ch, msg.program))
                return
            for m in self._find("program", ch, msg.program):
                self._note(m, True)

    def _find(self, control, ch, number):
        return [m for m in self.mappings if m.control == control and m.number == number
                and m.channel in (0, ch)]

    def _matching(self, ch, n):
        out = self._find("cc", ch, n)
        if n < 32:
            out += self._find("cc14", ch, n)
        elif n < 64:
            out += self._find("cc14", ch, n - 32)
        return out

    def _drive(self, m, pos, continuous):
        """A control at position ``pos`` (0..1) for mapping ``m``."""
        head, _, arg = m.target.partition(" ")
        if head in ACTIONS:
            on = pos >= 0.5
            st = self._picked.setdefault(m.key(), [True, None, None])
            was = st[1]
            st[1] = on
            if was == on:
                return
            if head in ("mute", "bypass"):
                self.controls.act(head, "on" if on else "off")
            elif head == "slot":
                self.controls.act("slot", "b" if on else "a")
            elif on:  # compare, preset: on the way up
                self.controls.act(head, arg)
            return
        prm = self.controls.param(m.target)
        cur = taper.to_position(prm, self.controls.value(m.target), m.lo, m.hi)
        st = self._picked.setdefault(m.key(), [False, None, None])
        picked, last, sent = st
        if picked and sent is not None and abs(cur - sent) > TAKEOVER:
            picked = False  # moved from elsewhere since: take it over again
        if not picked:
            crossed = last is not None and (last - cur) * (pos - cur) <= 0
            picked = abs(pos - cur) <= TAKEOVER or crossed
        st[0], st[1] = picked, pos
        if not picked:
            self.waiting += 1
            return
        v = taper.to_value(prm, pos, m.lo, m.hi)
        st[2] = taper.to_position(prm, v, m.lo, m.hi)
        self.controls.offer(m.target, v)

    def _note(self, m, down):
        head, _, arg = m.target.partition(" ")
        momentary = m.mode == "momentary" and m.control == "note"
        if head in ACTIONS:
            if head in ("mute", "bypass"):
                if momentary:
                    self.controls.act(head, "on" if down else "off")
                elif down:
                    self.controls.act(head, "toggle")
            elif head == "slot":
                if momentary:
                    self.controls.act("slot", "b" if down else "a")
                elif down:
                    self.controls.act("slot", "toggle")
            elif down:
                self.controls.act(head, arg)
            return
        prm = self.controls.param(m.target)
        a, b = taper.ends(prm, m.lo, m.hi)
        if momentary:
            v = b if down else a
        elif not down:
            return
        else:  # toggle between the ends
            cur = taper.to_position(prm, self.controls.value(m.target), m.lo, m.hi)
            v = a if cur >= 0.5 else b
            if m.control == "program":
                v = b
        self.controls.offer(m.target, v)

    # ---- learn ---------------------------------------------------------------------------------
    def learn(self, target):
        """The next control that moves drives ``target``."""
        self.controls.check_target(target)
        with self._lock:
            self.learning = target
            self._candidate = None

    def cancel_learn(self):
        with self._lock:
            self.learning = None
            self._candidate = None

    def _learn_cc(self, ch, n):
        cand = self._candidate
        if cand is not None and n == cand[0].number + 32 and ch == cand[0].channel:
            m = cand[0]
            self._learned(Mapping(m.target, "cc14", ch, m.number))
            return
        if n < 32:
            self._candidate = (Mapping(self.learning, "cc", ch, n), time.monotonic())
            return
        if cand is None:
            self._learned(Mapping(self.learning, "cc", ch, n))

    def _learn_timeout(self):
        cand = self._candidate
        if cand is not None and time.monotonic() - cand[1] > LEARN_PAIR_S:
            self._learned(cand[0])

    def _learned(self, m):
        with self._lock:
            self.learning = None
            self._candidate = None
            self.mappings = [x for x in self.mappings if x.key() != m.key()] + [m]
            self._picked.pop(m.key(), None)
        self.controls.notice("info", f"MIDI {m.label()} now drives {m.target}")

    def forget(self, target) -> int:
        with self._lock:
            keep = [m for m in self.mappings if m.target != target]
            n = len(self.mappings) - len(keep)
            self.mappings = keep
        return n

    def label(self, target) -> str:
        for m in self.mappings:
            if m.target == target:
                return m.label()
        return ""

    def save_mappings(self, path):
        return save_mappings(self.mappings, path)

    def load_mappings(self, path):
        ms = load_mappings(path)
        for m in ms:
            self.controls.check_target(m.target)
        with self._lock:
            self.mappings = ms
            self._picked.clear()
        return path
