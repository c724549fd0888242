"""OSC control over UDP: :class:`OscControl`, its addresses, and who may send.

Open Sound Control 1.0 messages (parsed and built with python-osc) arrive on one UDP socket,
read on a thread of its own; every parameter change goes through
:class:`livedyn.control.hub.Controls` (coalesced, at most one publication per block period,
recorded in the automation like a console change), every action through ``Controls.act``.

Addresses (livedyn's own naming; NAME is any parameter of the running algorithm or
``output_level``):

====================================  ==================================================
``/livedyn/value/NAME x``             set NAME in its own unit (a number, or text such
                                      as ``"4:1"``, ``"rms"``, ``"off"``)
``/livedyn/norm/NAME t``              set NAME by its position 0..1 on its taper
                                      (:mod:`livedyn.control.taper`)
``/livedyn/mute [on|off|1|0]``        mute (no argument: toggle); ``/livedyn/bypass`` too
``/livedyn/slot a|b``                 settings slot A or B (no argument: the other one)
``/livedyn/compare``                  the other settings slot
``/livedyn/preset NAME``              load a preset
``/livedyn/query [PORT] [NAME ...]``  reply with the current values (all, or the NAMEs),
                                      to the sender's address, or to PORT on the
                                      sender's host
====================================  ==================================================

A query is answered, per parameter, with ``/livedyn/value/NAME x`` (float; a choice's index),
``/livedyn/norm/NAME t`` and ``/livedyn/text/NAME "text"`` (as the console shows it), then
``/livedyn/mute``, ``/livedyn/bypass`` (int 0/1), ``/livedyn/slot`` when a console runs, and
last ``/livedyn/query/end n`` with the number of messages sent before it.

Who may send: the socket is bound to 127.0.0.1 unless told otherwise; packets are accepted
only from the networks in ``allow`` (default 127.0.0.0/8). Everything else — packets from
elsewhere, bytes that are not OSC, wrong argument types, values out of range, unknown
addresses, packets beyond :data:`MAX_RATE` a second — is counted in :attr:`OscControl.counts`
and ignored; at most one line every :data:`NOTICE_EVERY_S` seconds says so. Nothing a packet
holds can raise on the reader thread.

References
----------
M. Wright, "The Open Sound Control 1.0 Specification", CNMAT, 2002 (address patterns,
type tags ``i f s T F``, bundles, a packet's size a multiple of 4 — recalled from memory);
python-osc parses and builds the packets.
"""
from __future__ import annotations

import ipaddress
import math
import socket
import threading
import time

from pythonosc import osc_message_builder, osc_packet

from ..params import OUTPUT_LEVEL, ParamError
from . import taper

PREFIX = "/livedyn"
DEFAULT_PORT = 9161
LOOPBACK = "127.0.0.1"
#: Packets a second handled at most (a token bucket of MAX_BURST); the rest are counted as
#: flood and dropped unparsed. A person on a surface sends well under 1000 a second (common
#: practice, no source); the bound keeps a flood from taking the machine's time.
MAX_RATE = 4000.0
MAX_BURST = 400.0
#: Queries answered a second at most (each answer is about 70 datagrams).
MAX_QUERIES = 10.0
NOTICE_EVERY_S = 5.0
COUNTERS = ("received", "handled", "malformed", "wrong_type", "out_of_range", "unknown_address",
            "foreign", "flood", "replies", "errors")


class OscError(ParamError):
    """An OSC option that cannot be used (address, port, allow list); one line."""


def parse_allow(text):
    """``"192.168.1.0/24,10.0.0.5"`` -> a list of IPv4 networks; raises OscError."""
    nets = []
    for part in str(text).split(","):
        part = part.strip()
        if not part:
            continue
        try:
            net = ipaddress.ip_network(part, strict=False)
        except ValueError:
            raise OscError(f"--osc-allow {part!r}: expected an IPv4 address or network such as "
                           "192.168.1.20 or 192.168.1.0/24") from None
        if net.version != 4:
            raise OscError(f"--osc-allow {part!r}: only IPv4 is supported")
        nets.append(net)
    if not nets:
        raise OscError(f"--osc-allow {text!r}: expected one or more addresses or networks, "
                       "separated by commas")
    return nets


def check_bind(bind, allow):
    """Validate where to listen and who may send. Returns ``(bind, networks, warning)``:
    ``warning`` is a line to print when the socket listens beyond this machine (then an
    allow list is required)."""
    try:
        addr = ipaddress.ip_address(str(bind).strip())
    except ValueError:
        raise OscError(f"--osc-bind {bind!r}: expected an IPv4 address of this machine "
                       "(127.0.0.1, 0.0.0.0 for every interface, or one interface's)") from None
    if addr.version != 4:
        raise OscError(f"--osc-bind {bind!r}: only IPv4 is supported")
    nets = parse_allow(allow) if allow else None
    warning = None
    if not addr.is_loopback:
        if nets is None:
            raise OscError(f"--osc-bind {bind}: listening beyond this machine needs "
                           "--osc-allow ADDRESS[/BITS],... (who may send)")
        warning = (f"OSC: listening on {bind}, beyond this machine: anyone on "
                   f"{', '.join(map(str, nets))} can change the sound (OSC has no password); "
                   "use it only on a network you trust")
    if nets is None:
        nets = [ipaddress.ip_network("127.0.0.0/8")]
    return str(addr), nets, warning


def _msg(address, *args):
    b = osc_message_builder.OscMessageBuilder(address=address)
    for a in args:
        if isinstance(a, bool):
            b.add_arg(int(a), "i")
        elif isinstance(a, int):
            b.add_arg(a, "i")
        elif isinstance(a, float):
            b.add_arg(a, "f")
        else:
            b.add_arg(str(a), "s")
    return b.build().dgram


class _Bucket:
    def __init__(self, rate, burst):
        self.rate, self.burst = float(rate), float(burst)
        self.tokens, self.t = float(burst), time.monotonic()

    def take(self):
        now = time.monotonic()
        self.tokens = min(self.burst, self.tokens + (now - self.t) * self.rate)
        self.t = now
        if self.tokens >= 1.0:
            self.tokens -= 1.0
            return True
        return False


class _Ignore(Exception):
    """A packet to count under ``kind`` and ignore."""

    def __init__(self, kind):
        super().__init__(kind)
        self.kind = kind


class OscControl:
    """Read OSC packets from a UDP socket on a thread of its own and drive ``controls``.

    Parameters
    ----------
    controls : livedyn.control.hub.Controls
    port : int
        UDP port (0: any free port; :attr:`port` tells which).
    bind : str
        IPv4 address to listen on (default 127.0.0.1, this machine only).
    allow : list of ipaddress.IPv4Network, optional
        Senders accepted (default 127.0.0.0/8).
    """

    def __init__(self, controls, port=DEFAULT_PORT, bind=LOOPBACK, allow=None,
                 max_rate=MAX_RATE, max_burst=MAX_BURST):
        self.controls = controls
        self.allow = list(allow) if allow else [ipaddress.ip_network("127.0.0.0/8")]
        self.counts = dict.fromkeys(COUNTERS, 0)
        self._bucket = _Bucket(max_rate, max_burst)
        self._queries = _Bucket(MAX_QUERIES, MAX_QUERIES)
        self._told = dict(self.counts)
        self._told_at = time.monotonic()
        if not 0 <= int(port) <= 65535:
            raise OscError(f"--osc {port}: expected a UDP port 1 to 65535 (0: any free port)")
        sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        try:
            sock.bind((bind, int(port)))
        except OSError as e:
            sock.close()
            raise OscError(f"--osc {port}: cannot listen on {bind}:{port}: "
                           f"{e.strerror or e}") from None
        sock.settimeout(0.2)
        self.sock = sock
        self.bind, self.port = sock.getsockname()
        self._stop = threading.Event()
        self._thread = None
        controls.osc = self

    # ---- thread ----------------------------------------------------------------------------------
    def start(self):
        if self._thread is None:
            self._thread = threading.Thread(target=self._run, name="livedyn-osc", daemon=True)
            self._thread.start()
        return self

    def stop(self):
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=2.0)
            self._thread = None
        try:
            self.sock.close()
        except OSError:
            pass

    @property
    def alive(self):
        return self._thread is not None and self._thread.is_alive()

    def _run(self):
        while not self._stop.is_set():
            try:
                data, addr = self.sock.recvfrom(65536)
            except socket.timeout:
                self._maybe_tell()
                continue
            except OSError:
                if self._stop.is_set():
                    return
                self.counts["errors"] += 1
                self._stop.wait(0.01)
                continue
            try:
                self.handle_packet(data, addr)
            except Exception:  # nothing a packet holds may stop the reader
                self.counts["errors"] += 1
            self._maybe_tell()

    def _maybe_tell(self):
        now = time.monotonic()
        if now - self._told_at < NOTICE_EVERY_S:
            return
        kinds = [k for k in COUNTERS[2:8] if self.counts[k] > self._told[k]]
        if kinds:
            parts = ", ".join(f"{self.counts[k] - self._told[k]} {k.replace('_', ' ')}"
                              for k in kinds)
            try:
                self.controls.notice("warn", f"OSC: ignored packets in the last "
                                             f"{now - self._told_at:.0f} s: {parts}")
            except Exception:
                self.counts["errors"] += 1
        self._told = dict(self.counts)
        self._told_at = now

    # ---- packets ---------------------------------------------------------------------------------
    def allowed(self, host) -> bool:
        try:
            ip = ipaddress.ip_address(host)
        except ValueError:
            return False
        return any(ip in net for net in self.allow)

    def handle_packet(self, data, addr):
        """Handle one datagram from ``addr`` (host, port); never raises."""
        c = self.counts
        c["received"] += 1
        if not self.allowed(addr[0]):
            c["foreign"] += 1
            return
        if not self._bucket.take():
            c["flood"] += 1
            return
        if len(data) % 4:  # OSC 1.0: a packet's size is a multiple of 4 (python-osc would
            c["malformed"] += 1  # read a cut-short argument as a value)
            return
        try:
            packet = osc_packet.OscPacket(bytes(data))
            messages = [tm.message for tm in packet.messages]
        except Exception:
            c["malformed"] += 1
            return
        for msg in messages:
            try:
                self._handle(msg.address, list(msg.params), addr)
                c["handled"] += 1
            except _Ignore as e:
                c[e.kind] += 1
            except Exception:
                c["errors"] += 1

    def _handle(self, address, args, addr):
        if not isinstance(address, str) or not address.startswith(PREFIX + "/"):
            raise _Ignore("unknown_address")
        parts = address[len(PREFIX) + 1:].split("/")
        head = parts[0]
        if head in ("value", "norm") and len(parts) == 2:
            self._set(head, parts[1], args)
        elif head in ("mute", "bypass") and len(parts) == 1:
            self.controls.act(head, self._switch(args))
        elif head == "slot" and len(parts) == 1:
            if not args:
                self.controls.act("slot", "toggle")
                return
            v = str(args[0]).strip().lower() if len(args) == 1 else ""
            v = {"0": "a", "1": "b"}.get(v, v)
            if v not in ("a", "b"):
                raise _Ignore("wrong_type")
            self.controls.act("slot", v)
        elif head == "compare" and len(parts) == 1:
            self.controls.act("compare")
        elif head == "preset" and len(parts) == 1:
            if len(args) != 1 or not isinstance(args[0], str) or not args[0].strip():
                raise _Ignore("wrong_type")
            self.controls.act("preset", args[0].strip())
        elif head == "query" and len(parts) == 1:
            self._query(args, addr)
        else:
            raise _Ignore("unknown_address")

    def _param(self, name):
        try:
            return self.controls.param(name)
        except Exception:
            raise _Ignore("unknown_address") from None

    def _set(self, kind, name, args):
        prm = self._param(name)
        if len(args) != 1:
            raise _Ignore("wrong_type")
        x = args[0]
        if kind == "norm":
            if isinstance(x, bool) or not isinstance(x, (int, float)):
                raise _Ignore("wrong_type")
            t = float(x)
            if not (0.0 <= t <= 1.0):  # NaN fails this too
                raise _Ignore("out_of_range")
            v = taper.to_value(prm, t)
        else:
            if isinstance(x, bytes) or isinstance(x, (list, tuple)) or x is None:
                raise _Ignore("wrong_type")
            if isinstance(x, float) and math.isnan(x):
                raise _Ignore("out_of_range")
            try:
                v = prm.parse(x)
            except ParamError as e:
                kind = "out_of_range" if "out of range" in str(e) or \
                    isinstance(x, (int, float)) else "wrong_type"
                raise _Ignore(kind) from None
        self.controls.offer(prm.name, v)

    @staticmethod
    def _switch(args):
        if not args:
            return "toggle"
        if len(args) != 1:
            raise _Ignore("wrong_type")
        x = args[0]
        if isinstance(x, bool):
            return "on" if x else "off"
        if isinstance(x, (int, float)) and x in (0, 1):
            return "on" if x else "off"
        if isinstance(x, str) and x.strip().lower() in ("on", "off", "toggle"):
            return x.strip().lower()
        raise _Ignore("wrong_type")

    # ---- queries -----------------------------------------------------------------------------------
    def _query(self, args, addr):
        host, port = addr[0], addr[1]
        names = []
        for a in args:
            if isinstance(a, int) and not isinstance(a, bool) and not names:
                if not 1 <= a <= 65535:
                    raise _Ignore("out_of_range")
                port = a
            elif isinstance(a, str):
                names.append(a)
            else:
                raise _Ignore("wrong_type")
        prms = [self._param(n) for n in names] if names else self._all_params()
        if not self._queries.take():
            raise _Ignore("flood")
        out = []
        for prm in prms:
            try:
                v = float(self.controls.value(prm.name))
            except Exception:
                continue
            out.append(_msg(f"{PREFIX}/value/{prm.name}", v))
            out.append(_msg(f"{PREFIX}/norm/{prm.name}", float(taper.to_position(prm, v))))
            out.append(_msg(f"{PREFIX}/text/{prm.name}", prm.format(v)))
        if not names:
            for k, v in self.controls.state().items():
                out.append(_msg(f"{PREFIX}/{k}", v))
        out.append(_msg(f"{PREFIX}/query/end", len(out)))
        for d in out:
            try:
                self.sock.sendto(d, (host, port))
                self.counts["replies"] += 1
            except OSError:
                self.counts["errors"] += 1

    def _all_params(self):
        eng = self.controls.engine
        return [eng.proc.schema[n] for n in eng.proc.schema.names()] + [OUTPUT_LEVEL]

    def describe(self):
        """One line for the start of a run."""
        nets = ", ".join(map(str, self.allow))
        return (f"OSC: listening on udp {self.bind}:{self.port} ({PREFIX}/value/NAME, "
                f"{PREFIX}/norm/NAME, {PREFIX}/query; senders from {nets})")
