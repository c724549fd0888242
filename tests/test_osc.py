"""OSC control (livedyn.control.osc) through real UDP sockets on 127.0.0.1 only: set in the
parameter's unit and normalised, the query and its replies, malformed packets of every kind,
a flood, a sender outside the allow list (an allow list that leaves out 127.0.0.1), and a live
run on a headless JACK server where an OSC set reaches the callback and the automation.

Checks are against livedyn's own documented rules (the addresses and counters in
livedyn/control/osc.py, the tapers in livedyn/control/taper.py, the README's automation
file). Packets are built with python-osc; the OSC 1.0 type tags (i, f, s) follow M. Wright,
"The Open Sound Control 1.0 Specification", 2002."""
from __future__ import annotations

import ipaddress
import shutil
import socket
import time

import numpy as np
import pytest
from pythonosc import osc_bundle_builder, osc_message, osc_message_builder, osc_packet

from livedyn.control import taper
from livedyn.control.hub import Controls
from livedyn.control.osc import OscControl, OscError, check_bind, parse_allow
from livedyn.params import ALL, OUTPUT_LEVEL

from tests.test_midi import BS, FS, SurfaceEngine

HOST = "127.0.0.1"


def build(address, *args):
    b = osc_message_builder.OscMessageBuilder(address=address)
    for a in args:
        b.add_arg(a)
    return b.build().dgram


def _wait(cond, timeout=3.0):
    t_end = time.monotonic() + timeout
    while time.monotonic() < t_end:
        if cond():
            return True
        time.sleep(0.002)
    return False


@pytest.fixture
def rig():
    e = SurfaceEngine()
    c = Controls(e, period_s=0.001).start()
    osc = OscControl(c, 0, bind=HOST).start()
    tx = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    tx.bind((HOST, 0))
    tx.settimeout(2.0)
    yield e, c, osc, tx
    c.stop()
    tx.close()
    assert not osc.alive


def send(tx, osc, data):
    tx.sendto(data, (HOST, osc.port))


def handled_after(osc, n0, k=1):
    return _wait(lambda: sum(osc.counts[x] for x in ("handled", "malformed", "wrong_type",
                                                     "out_of_range", "unknown_address",
                                                     "foreign", "flood")) >= n0 + k)


def total(osc):
    return sum(osc.counts[x] for x in ("handled", "malformed", "wrong_type", "out_of_range",
                                       "unknown_address", "foreign", "flood"))


def test_set_in_the_unit_and_normalised_reaches_the_engine(rig):
    e, c, osc, tx = rig
    assert osc.bind == HOST and osc.port > 0
    send(tx, osc, build("/livedyn/value/threshold", -33.5))
    assert _wait(lambda: e.get("threshold") == -33.5)
    send(tx, osc, build("/livedyn/value/ratio", "4:1"))  # text in the unit, as typed
    assert _wait(lambda: e.get("ratio") == 4.0)
    send(tx, osc, build("/livedyn/value/detector", "rms"))
    assert _wait(lambda: e.get("detector") == ALL["detector"].choices.index("rms"))
    send(tx, osc, build("/livedyn/norm/release", 0.5))  # geometric taper of 1..5000 ms
    want = taper.to_value(ALL["release"], 0.5)
    assert _wait(lambda: e.get("release") == pytest.approx(want))
    assert want == pytest.approx((1 * 5000) ** 0.5)
    send(tx, osc, build("/livedyn/value/output_level", -24))  # an int: the i type tag
    assert _wait(lambda: e.level == -24.0)
    send(tx, osc, build("/livedyn/norm/output_level", 0.0))  # the fader's bottom is off
    assert _wait(lambda: e.level == float("-inf"))
    send(tx, osc, build("/livedyn/bypass", 1))
    assert _wait(lambda: e.bypassed)
    send(tx, osc, build("/livedyn/bypass"))  # no argument: toggle
    assert _wait(lambda: not e.bypassed)
    send(tx, osc, build("/livedyn/mute", "on"))
    assert _wait(lambda: e.muted)
    # a bundle of two messages: both are taken
    bb = osc_bundle_builder.OscBundleBuilder(osc_bundle_builder.IMMEDIATELY)
    bb.add_content(osc_message_builder.OscMessageBuilder("/livedyn/value/knee").build())
    m = osc_message_builder.OscMessageBuilder("/livedyn/value/knee")
    m.add_arg(9.0)
    bb.add_content(m.build())
    m = osc_message_builder.OscMessageBuilder("/livedyn/value/makeup")
    m.add_arg(3.0)
    bb.add_content(m.build())
    send(tx, osc, bb.build().dgram)
    assert _wait(lambda: e.get("knee") == 9.0 and e.get("makeup") == 3.0)
    assert osc.counts["wrong_type"] == 1  # the bundle's knee without a value
    assert osc.counts["malformed"] == 0 and osc.counts["errors"] == 0


def _replies(tx):
    out = {}
    while True:
        data, _ = tx.recvfrom(65536)
        msg = osc_message.OscMessage(data)
        out[msg.address] = list(msg.params)
        if msg.address == "/livedyn/query/end":
            return out


def test_query_replies_with_every_value_in_its_unit_normalised_and_as_text(rig):
    e, c, osc, tx = rig
    e.set("threshold", -30.0)
    e.set("ratio", float("inf"))
    e.set(OUTPUT_LEVEL.name, -12.0)
    send(tx, osc, build("/livedyn/query"))
    r = _replies(tx)
    names = list(e.proc.schema.names()) + ["output_level"]
    assert len(names) >= 20
    for n in names:
        assert f"/livedyn/value/{n}" in r and f"/livedyn/norm/{n}" in r and \
            f"/livedyn/text/{n}" in r, n
    assert r["/livedyn/value/threshold"] == [pytest.approx(-30.0)]
    assert r["/livedyn/norm/threshold"] == [pytest.approx(taper.to_position(ALL["threshold"],
                                                                            -30.0))]
    assert r["/livedyn/text/ratio"] == [ALL["ratio"].format(float("inf"))]
    assert r["/livedyn/norm/ratio"] == [1.0] and r["/livedyn/value/ratio"] == [float("inf")]
    assert r["/livedyn/value/output_level"] == [-12.0]
    assert r["/livedyn/mute"] == [0] and r["/livedyn/bypass"] == [0]
    assert r["/livedyn/query/end"] == [len(r) - 1]  # the count of messages before it
    # a query for some names, answered to another port on the sender's host
    rx = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    rx.bind((HOST, 0))
    rx.settimeout(2.0)
    try:
        send(tx, osc, build("/livedyn/query", rx.getsockname()[1], "threshold", "output_level"))
        r2 = _replies(rx)
    finally:
        rx.close()
    assert sorted(r2) == sorted(["/livedyn/value/threshold", "/livedyn/norm/threshold",
                                 "/livedyn/text/threshold", "/livedyn/value/output_level",
                                 "/livedyn/norm/output_level", "/livedyn/text/output_level",
                                 "/livedyn/query/end"])


def test_malformed_packets_are_counted_and_ignored(rig):
    e, c, osc, tx = rig
    rng = np.random.default_rng(12)
    n0 = total(osc)
    junk = [bytes(rng.integers(0, 256, int(k), dtype=np.uint8)) for k in rng.integers(1, 200, 50)]
    junk += [b"", b"/livedyn/value/threshold", b"#bundle\0" + b"\xff" * 9,
             b"/livedyn/value/threshold\0\0\0\0,f\0\0\x01"]  # cut short
    for d in junk:
        send(tx, osc, d)
    assert handled_after(osc, n0, len(junk))
    bad = [  # (packet, the counter it lands in)
        (build("/livedyn/value/threshold", "loud"), "wrong_type"),
        (build("/livedyn/value/threshold", b"\x00\x01"), "wrong_type"),  # a blob
        (build("/livedyn/value/threshold", -20.0, 3.0), "wrong_type"),
        (build("/livedyn/norm/threshold", "half"), "wrong_type"),
        (build("/livedyn/mute", 7), "wrong_type"),
        (build("/livedyn/slot", "c"), "wrong_type"),
        (build("/livedyn/value/threshold", 30.0), "out_of_range"),
        (build("/livedyn/value/threshold", float("nan")), "out_of_range"),
        (build("/livedyn/value/ratio", 0.5), "out_of_range"),
        (build("/livedyn/norm/threshold", 1.5), "out_of_range"),
        (build("/livedyn/value/output_level", 6.0), "out_of_range"),
        (build("/livedyn/value/nosuch", 1.0), "unknown_address"),
        (build("/livedyn/threshold", 1.0), "unknown_address"),
        (build("/other/value/threshold", 1.0), "unknown_address"),
        (build("/livedyn/value/threshold/x", 1.0), "unknown_address"),
    ]
    before = dict(osc.counts)
    for d, _ in bad:
        send(tx, osc, d)
    assert handled_after(osc, n0 + len(junk), len(bad))
    for kind in ("wrong_type", "out_of_range", "unknown_address"):
        assert osc.counts[kind] - before[kind] == sum(1 for _, k in bad if k == kind), kind
    # random bytes: every one counted somewhere, none handled as a change, no exception
    assert osc.counts["errors"] == 0 and osc.alive
    # what python-osc (the reference parser) refuses, or whose size is not a multiple of 4
    # (OSC 1.0 packets always are; recalled from memory), is what we counted as malformed
    refused = 0
    for d in junk:
        try:
            osc_packet.OscPacket(d)
            refused += len(d) % 4 != 0
        except Exception:
            refused += 1
    assert before["malformed"] == refused
    assert e.get("threshold") == -20.0 and c.published == 0  # nothing changed
    send(tx, osc, build("/livedyn/value/threshold", -21.0))  # and it still listens
    assert _wait(lambda: e.get("threshold") == -21.0)


def test_a_flood_is_counted_coalesced_and_leaves_the_reader_alive(rig):
    e, c, osc0, tx = rig
    osc0.stop()
    # a rate bound of 500 packets a second (burst 50) instead of the default, so that the
    # bound takes effect on a loaded machine too (the kernel drops what the reader cannot take)
    osc = OscControl(c, 0, bind=HOST, max_rate=500, max_burst=50).start()
    n = 20000
    sent = 0
    for i in range(n):
        try:
            send(tx, osc, build("/livedyn/norm/threshold", (i % 100) / 100.0))
            sent += 1
        except OSError:  # the socket buffer is full: that too is a flood
            pass
    last = -1
    while total(osc) != last:  # until the reader has taken what the kernel kept
        last = total(osc)
        time.sleep(0.3)
    got = total(osc)
    print(f"flood: {sent} sent, {osc.counts['received']} received, {osc.counts['handled']} "
          f"handled, {osc.counts['flood']} counted as flood, {c.offered} offers, "
          f"{c.published} publications")
    assert osc.counts["flood"] > 0  # the rate bound took effect
    assert osc.counts["handled"] + osc.counts["flood"] == osc.counts["received"] == got
    assert c.published < osc.counts["handled"]  # coalesced before the engine
    assert osc.counts["errors"] == 0 and osc.alive
    time.sleep(0.2)  # the bucket refills
    send(tx, osc, build("/livedyn/value/threshold", -44.0))
    assert _wait(lambda: e.get("threshold") == -44.0)
    osc.stop()


def test_senders_outside_the_allow_list_are_ignored():
    e = SurfaceEngine()
    c = Controls(e, period_s=0.001).start()
    # an allow list that leaves out this machine: 127.0.0.1 stands for a foreign sender
    osc = OscControl(c, 0, bind=HOST, allow=parse_allow("10.0.0.0/8,192.168.7.7")).start()
    tx = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    tx.bind((HOST, 0))
    tx.settimeout(0.3)
    try:
        for d in (build("/livedyn/value/threshold", -50.0), build("/livedyn/mute", 1),
                  build("/livedyn/query"), b"junk"):
            send(tx, osc, d)
        assert _wait(lambda: osc.counts["foreign"] == 4)
        with pytest.raises(socket.timeout):  # no answer to a query from elsewhere
            tx.recvfrom(65536)
        assert e.get("threshold") == -20.0 and not e.muted and c.offered == 0
        assert osc.counts["malformed"] == 0 and osc.counts["replies"] == 0
    finally:
        c.stop()
        tx.close()


def test_bind_and_allow_options_are_checked_before_anything_listens():
    assert check_bind("127.0.0.1", None) == ("127.0.0.1", [ipaddress.ip_network("127.0.0.0/8")],
                                             None)
    with pytest.raises(OscError, match="needs --osc-allow"):
        check_bind("0.0.0.0", None)
    bind, nets, warning = check_bind("0.0.0.0", "192.168.1.0/24")  # checked, not bound
    assert nets == [ipaddress.ip_network("192.168.1.0/24")] and "beyond this machine" in warning
    with pytest.raises(OscError, match="'my-laptop'"):
        check_bind("my-laptop", None)
    with pytest.raises(OscError, match="'300.1.1.1'"):
        parse_allow("10.0.0.1,300.1.1.1")
    with pytest.raises(OscError, match="IPv4"):
        parse_allow("::1")


def test_a_port_in_use_is_one_line():
    e = SurfaceEngine()
    c = Controls(e)
    a = OscControl(c, 0, bind=HOST)
    try:
        with pytest.raises(OscError, match=f"cannot listen on 127.0.0.1:{a.port}"):
            OscControl(c, a.port, bind=HOST)
    finally:
        a.stop()


# ---- live, through JACK --------------------------------------------------------------------

@pytest.mark.jack(capture=2, playback=2)
def test_osc_set_reaches_the_callback_and_the_automation(jack_server, tmp_path):
    if shutil.which("jackd") is None:
        pytest.skip("jackd not installed")
    import livedyn
    from livedyn.automation import Automation
    from livedyn.engine import callback as cb
    from livedyn.engine.engine import ArraySource, Engine

    rng = np.random.default_rng(5)
    music = (0.1 * rng.standard_normal((FS, 2))).astype(np.float32)
    proc = livedyn.Processor("compressor", FS, 2)
    eng = Engine(proc, BS, device="system", main_source=ArraySource(music, loop=True),
                 record_dir=tmp_path / "rec")
    controls = Controls(eng)
    osc = OscControl(controls, 0, bind=HOST).start()
    controls.start()
    eng.start()
    tx = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    tx.bind((HOST, 0))
    tx.settimeout(2.0)
    try:
        assert _wait(lambda: eng.stats[cb.S_BLOCKS] > 50)
        seq0 = int(eng.stats[cb.S_PARAM_SEQ])
        f0 = int(eng.stats[cb.S_FRAMES])
        send(tx, osc, build("/livedyn/value/threshold", -37.0))
        assert _wait(lambda: eng.get("threshold") == -37.0)
        assert _wait(lambda: eng.stats[cb.S_PARAM_SEQ] > seq0)  # the callback took it
        applied = int(eng.stats[cb.S_PARAM_FRAME])
        send(tx, osc, build("/livedyn/norm/output_level", 0.5))  # -30 dB, not recorded
        assert _wait(lambda: eng.get("output_level") == -30.0)
        send(tx, osc, build("/livedyn/query", "threshold"))
        r = _replies(tx)
        assert r["/livedyn/value/threshold"] == [-37.0]
    finally:
        controls.stop()
        eng.stop()
        tx.close()
    auto = Automation.load(tmp_path / "rec" / "automation.txt", proc.schema)
    thr = [(f, v) for f, n, v in auto if n == "threshold" and f > 0]
    assert len(thr) == 1 and thr[0][1] == -37.0
    assert f0 <= thr[0][0] <= applied + BS  # stamped at the block that took it
    assert all(n != "output_level" for _, n, _ in auto)
