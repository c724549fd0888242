"""The console's screen: panels drawn as text from a :class:`~.model.ConsoleModel`.

Each panel is a function ``draw(model, width, height) -> list of lines``, a line being a list
of ``(style, text)`` fragments; :class:`DrawnControl` shows one in a prompt_toolkit window and
redraws it at whatever size the window has (so a terminal resize simply redraws).

Screen, top to bottom: the header (algorithm, slot, bypass/mute/monitor, level match), the
parameter list beside the static curve, the meters with the output fader, the gain-reduction
strip, the message area (the latest message, wrapped, never cut) and the command line. The help
screen and the message log replace the middle part while open. A window smaller than
:data:`MIN_COLUMNS` x :data:`MIN_ROWS` shows a line saying so instead of the middle part.
"""
from __future__ import annotations

import math
import re
import textwrap
from dataclasses import dataclass

from prompt_toolkit.buffer import Buffer
from prompt_toolkit.filters import Condition
from prompt_toolkit.layout import HSplit, Layout, VSplit, Window
from prompt_toolkit.layout.containers import ConditionalContainer
from prompt_toolkit.layout.controls import BufferControl, FormattedTextControl, UIContent, UIControl
from prompt_toolkit.layout.dimension import Dimension as D

from ..params import OUTPUT_LEVEL
from .model import FLOOR_DB, one_line

METER_LO_DB = -60.0  # left end of the level bars, dBFS
GR_FULL_DB = 24.0  # right end of the gain-reduction bar, dB
STRIP_LEVELS = " ▁▂▃▄▅▆▇█"
PARAM_NAME_W = 12
#: Smallest window the console draws its panels in.
MIN_COLUMNS, MIN_ROWS = 60, 18
#: Lines the message area may take before it scrolls its start away (the log keeps it all).
STATUS_MAX_ROWS = 4


# ---------------------------------------------------------------------------------------------
# helpers

def _fit(frags, width, fill_style=""):
    """Cut or pad a line of fragments to exactly ``width`` cells, joining neighbours of the
    same style (fewer fragments render faster)."""
    out, used = [], 0
    for style, text in frags:
        if used >= width:
            break
        text = text[: width - used]
        if not text:
            continue
        if out and out[-1][0] == style:
            out[-1] = (style, out[-1][1] + text)
        else:
            out.append((style, text))
        used += len(text)
    if used < width:
        out.append((fill_style, " " * (width - used)))
    return out


def _db(v, width=6, digits=1):
    """A level for display: '-14.0', or '--' for silence / no reading."""
    if v is None or (isinstance(v, float) and math.isnan(v)) or v <= FLOOR_DB + 1:
        return "--".rjust(width)
    return f"{v:{width}.{digits}f}"


def _top(values):
    vals = [float(v) for v in (values or []) if v is not None]
    return max(vals) if vals else None


def _zone(db):
    if db is None:
        return "class:meter.low"
    if db >= -3.0:
        return "class:meter.high"
    if db >= -18.0:
        return "class:meter.mid"
    return "class:meter.low"


def level_bar(db, hold, width, lo=METER_LO_DB, hi=0.0):
    """A level bar ``[=====|---]`` of ``width`` cells (brackets included) for ``db`` dBFS with a
    hold mark at ``hold``."""
    inner = max(1, width - 2)

    def cells(v):
        if v is None or v <= lo:
            return 0
        return int(round(min(1.0, (v - lo) / (hi - lo)) * inner))

    n = cells(db)
    h = cells(hold) - 1 if hold is not None and hold > lo else -1
    frags = [("class:bar.edge", "[")]
    for i in range(inner):
        if i == h and i >= n:
            frags.append(("class:hold", "|"))
        elif i < n:
            frags.append((_zone(lo + (i + 1) / inner * (hi - lo)), "="))
        else:
            frags.append(("class:bar.empty", "-"))
    frags.append(("class:bar.edge", "]"))
    return frags


def gr_bar(gr, width, full=GR_FULL_DB):
    inner = max(1, width - 2)
    n = int(round(min(1.0, max(0.0, gr or 0.0) / full) * inner))
    return [("class:bar.edge", "["), ("class:gr", "=" * n), ("class:bar.empty", "-" * (inner - n)),
            ("class:bar.edge", "]")]


# ---------------------------------------------------------------------------------------------
# panels

def draw_header(m, width, height):
    prec = getattr(getattr(m.engine, "proc", None), "precision", "float64")
    frags = [("class:title", f" {m.title} | {m.algorithm.name}"
              + (f" ({prec})" if prec != "float64" else "") + " ")]
    frags.append(("class:title.slot", f" slot {m.active.upper()} "))
    if m.bypassed:
        frags.append(("class:title.bypass", " BYPASS "))
    if m.muted:
        frags.append(("class:title.mute", " MUTED "))
    mon = m.monitor_mode
    frags.append(("class:title.warn" if mon != "out" else "class:title", f" monitor {mon} "))
    if m.match:
        frags.append(("class:title.match", " " + m.match_text() + " "))
    if m.pending:
        frags.append(("class:title", " (applying) "))
    frags.append(("class:title", " ? help "))
    return [_fit(frags, width, "class:title")]


def draw_params(m, width, height):
    lines = []
    marks = any(m.differs(n) for n in m.names)
    head = f" parameters {m.selected + 1}/{len(m.names)}, slot {m.active.upper()}"
    if marks:
        legend = f"  *: {m._other().upper()} differs"
        head += legend if len(head) + len(legend) <= width else " *"
    lines.append(_fit([("class:head", head)], width, "class:head"))
    rows = max(1, height - 1)
    top, names = m.visible_params(rows)
    val_w = max(4, width - PARAM_NAME_W - 4)
    for i, n in enumerate(names):
        idx = top + i
        prm = m.schema[n]
        sel = idx == m.selected
        val = prm.format(m.value(n))
        if n == "makeup" and m.match_trim:
            val = f"{val} {m.match_trim:+.1f}"
        mark = ">" if sel else " "
        more = ""
        if i == 0 and top > 0:
            more = "^"
        elif i == len(names) - 1 and top + len(names) < len(m.names):
            more = "v"
        diff = "*" if m.differs(n) else (more or " ")
        learned = m.mapping_label(n)
        name_w = PARAM_NAME_W
        shown = n
        if learned:  # the MIDI control beside the name ("threshold~cc21/1") or the value
            bare = val.rsplit(" ", 1)[0]  # the value without its unit
            if len(val) + len(learned) + 2 <= val_w:
                val = f"{val} ~{learned}"
            elif len(n) + 1 + len(learned) <= name_w:
                shown = f"{n}~{learned}"
            elif len(bare) + len(learned) + 2 <= val_w:
                val = f"{bare} ~{learned}"
            else:  # no room for the whole label: a mark that one is mapped
                shown = f"{n[:name_w - 1]}~"
        text = f"{mark}{shown:<{name_w}} {val:>{val_w}} {diff}"
        style = "class:param.sel" if sel else "class:param"
        lines.append(_fit([(style, text)], width, style))
    return lines


def _curve_range(m):
    lo = -60.0
    if "threshold" in m.schema:
        thr = m.value("threshold")
        lo = min(lo, math.floor((thr - 15.0) / 10.0) * 10.0)
    lo = max(lo, -90.0)
    return lo, 0.0


_CURVE_CACHE = {}


def _curve_points(m, xs):
    """Output levels of the static curve at ``xs``, kept while the live values stay the same
    (the curve is redrawn 20 times a second, the values change rarely)."""
    key = (id(m), tuple(sorted(m.live_values().items())), tuple(xs))
    ys = _CURVE_CACHE.get(key)
    if ys is None:
        if len(_CURVE_CACHE) > 16:
            _CURVE_CACHE.clear()
        ys = [m.curve_output_db(x) for x in xs]
        _CURVE_CACHE[key] = ys
    return ys


def draw_curve(m, width, height):
    """The static curve (x: input or key level, y: output), the unity line, the threshold and
    the operating point '@'."""
    title = f" curve: {m.curve_x_label} -> {m.curve_y_label}; @ now"
    lines = [_fit([("class:head", title)], width, "class:head")]
    label_w = 5
    plot_w = width - label_w - 1
    plot_h = height - 2
    if plot_w < 8 or plot_h < 3:
        lines.append(_fit([("class:dim", " (enlarge the terminal for the curve)")], width))
        return lines[:height]
    xlo, xhi = _curve_range(m)
    xs = [xlo + (c + 0.5) * (xhi - xlo) / plot_w for c in range(plot_w)]
    ys = _curve_points(m, xs)
    ylo = xlo
    yhi = max(0.0, min(24.0, math.ceil(max(ys) / 6.0) * 6.0))

    def row_of(y):
        f = (yhi - y) / (yhi - ylo)
        return int(round(f * (plot_h - 1)))

    grid = [[(" ", "class:plot")] * plot_w for _ in range(plot_h)]
    for c, x in enumerate(xs):  # unity line
        r = row_of(x)
        if 0 <= r < plot_h:
            grid[r][c] = (".", "class:unity")
    prev = None
    for c, y in enumerate(ys):
        r = min(plot_h - 1, max(0, row_of(y)))
        if y < ylo - 1e-9:
            r = plot_h - 1
        span = [r] if prev is None else range(min(prev, r), max(prev, r) + 1)
        for rr in span:  # join steep parts so that a gate's step is one line
            grid[rr][c] = ("*", "class:curve")
        prev = r
    if "threshold" in m.schema:
        thr = m.value("threshold")
        tc = int((thr - xlo) / (xhi - xlo) * plot_w)
        if 0 <= tc < plot_w:
            for rr in range(plot_h):
                if grid[rr][tc][0] == " ":
                    grid[rr][tc] = (":", "class:thresh")
    pt = m.operating_point()
    if pt is not None:
        x, y = pt
        c = int((min(max(x, xlo), xhi - 1e-9) - xlo) / (xhi - xlo) * plot_w)
        r = min(plot_h - 1, max(0, row_of(y)))
        grid[r][c] = ("@", "class:point")
    label_rows = {0: yhi, plot_h - 1: ylo, (plot_h - 1) // 2: (yhi + ylo) / 2}
    for r in range(plot_h):
        lab = f"{label_rows[r]:>{label_w - 1}.0f}" if r in label_rows else " " * (label_w - 1)
        frags = [("class:axis", lab + " |")]
        frags += [(st, ch) for ch, st in grid[r]]
        lines.append(_fit(frags, width))
    axis = [" "] * plot_w
    step = 10 if plot_w >= 60 else 20
    v = math.ceil(xlo / step) * step
    while v <= xhi:
        c = int((v - xlo) / (xhi - xlo) * (plot_w - 1))
        txt = f"{v:.0f}"
        c0 = max(0, min(plot_w - len(txt), c - len(txt) // 2))
        if all(a == " " for a in axis[max(0, c0 - 1):c0 + len(txt) + 1]):
            axis[c0:c0 + len(txt)] = list(txt)
        v += step
    lines.append(_fit([("class:axis", " " * label_w + "+" + "".join(axis))], width))
    return lines[:height]


def meter_line_count(m):
    return 2 * (m.proc.channels + 1) + 3


def draw_meters(m, width, height):
    snap = m.snap or {}
    met = snap.get("meters") or {}
    ch = m.proc.channels
    lines = []
    bar_w = max(8, min(42, width - 46))
    for way in ("in", "out"):
        ms = met.get(way) or {}
        peaks = ms.get("peak_dbfs") or snap.get(f"peak_{way}_dbfs") or []
        holds = ms.get("peak_hold_dbfs") or []
        rms = ms.get("rms_dbfs") or []
        for c in range(ch):
            pk = peaks[c] if c < len(peaks) else None
            hd = holds[c] if c < len(holds) else None
            rm = rms[c] if c < len(rms) else None
            frags = [("class:label", f"{way:<3} {c + 1} ")]
            frags += level_bar(pk, hd, bar_w)
            frags.append(("class:value", f" pk {_db(pk)} hold {_db(hd)} rms {_db(rm)} dBFS"))
            lines.append(_fit(frags, width))
        mom = ms.get("momentary_lufs")
        st = ms.get("short_term_lufs")
        tp = _top(ms.get("true_peak_dbtp"))
        tpmax = ms.get("max_true_peak_dbtp")
        lines.append(_fit([("class:label", f"{way:<3}   "),
                           ("class:value", f"momentary {_db(mom)}  short-term {_db(st)} LUFS  "
                                           f"true peak {_db(tp)} max {_db(tpmax)} dBTP")],
                          width))
    key = _top(snap.get("peak_key_dbfs"))
    gr = float(snap.get("gain_reduction_db", 0.0) or 0.0)
    half = max(6, (width - 40) // 2)
    frags = [("class:label", "key   ")]
    if getattr(m.proc, "key_channels", 0):
        frags += level_bar(key, None, half)
        frags.append(("class:value", f" {_db(key)} dBFS   "))
    else:
        frags.append(("class:dim", "(no key input)".ljust(half + 14)))
    frags.append(("class:label", "GR "))
    if m.bypassed:  # the processor's gain is not heard: say so rather than show it
        frags += [("class:title.bypass", " bypassed ")]
    else:
        frags += gr_bar(gr, half)
        frags.append(("class:value", f" {gr:5.1f} dB"))
    lines.append(_fit(frags, width))
    load = snap.get("callback_load") or {}
    lat = snap.get("stream_latency_s") or {}
    la = snap.get("lookahead_samples")
    fs = snap.get("samplerate") or m.samplerate
    lat_txt = (f"in {1000 * lat.get('input', 0.0):.1f} ms + out "
               f"{1000 * lat.get('output', 0.0):.1f} ms" if lat else "--")
    text = (f"load {100 * load.get('median', 0.0):.1f} % (max {100 * load.get('max', 0.0):.0f} %)"
            f"  late {m.count('late_blocks')}  flagged {m.count('flagged_blocks')}"
            f"  latency {lat_txt}")
    rt = snap.get("realtime") or {}
    if rt.get("policy") not in (None, "unknown"):  # what real time the callback was granted
        text += (f"  rt {rt['policy'].replace('SCHED_', '').lower()}"
                 + (f" {rt['priority']}" if rt.get("granted") else "")
                 + (" locked" if rt.get("memory_locked") else ""))
    if len(text) > width:
        text = (f"load {100 * load.get('median', 0.0):.1f}% (max {100 * load.get('max', 0.0):.0f}%)"
                f"  late {m.count('late_blocks')} flagged {m.count('flagged_blocks')}"
                f"  latency {lat_txt}")
    lines.append(_fit([("class:value", text)], width))
    lines.append(_fit(draw_fader(m, width, la, fs), width))
    return lines[:height]


def draw_fader(m, width, la=None, fs=48000.0):
    """The output level fader with its value, then the processor's lookahead."""
    lv = m.output_level
    la_txt = f"   lookahead {la} smp ({1000.0 * la / fs:.1f} ms)" if la is not None else ""
    if lv is None:
        return [("class:dim", "output level: (none)"), ("class:value", la_txt)]
    bar_w = max(8, min(30, width - 46))
    shown = OUTPUT_LEVEL.format(lv)
    frags = [("class:label", "output level ")]
    frags += level_bar(None if math.isinf(lv) else lv, None, bar_w, lo=OUTPUT_LEVEL.lo, hi=0.0)
    frags.append(("class:value", f" {shown:>8} (- +)" + la_txt))
    return frags


def draw_strip(m, width, height, seconds=5.0):
    """Gain reduction over the last ``seconds``: newest on the right, ``height`` rows tall."""
    label = f" GR {seconds:g} s "
    cols = max(1, width - len(label) - 10)
    vals = m.gr_strip(cols, seconds)
    peak = max([v for v in vals if v is not None] + [0.0])
    full = max(6.0, math.ceil(peak / 6.0) * 6.0)
    rows = max(1, height)
    levels = len(STRIP_LEVELS) - 1
    lines = []
    for r in range(rows):  # r = 0 is the top row
        chars = []
        for v in vals:
            if v is None:
                chars.append(" ")
                continue
            eighths = int(round(min(1.0, max(0.0, v) / full) * rows * levels))
            k = eighths - (rows - 1 - r) * levels
            chars.append(STRIP_LEVELS[max(0, min(levels, k))])
        lab = label if r == rows - 1 else " " * len(label)
        end = f"| 0-{full:g} dB" if r == rows - 1 else "|"
        lines.append(_fit([("class:label", lab), ("class:bar.edge", "|"),
                           ("class:gr", "".join(chars)), ("class:bar.edge", end)], width))
    return lines


def status_lines(m, width):
    """The latest message wrapped to ``width`` (never cut: past :data:`STATUS_MAX_ROWS` lines
    its start gives way, and the log keeps it whole)."""
    text = m.status.text
    rows = textwrap.wrap(text, max(10, width - 2), break_on_hyphens=False) or [""]
    if len(rows) > STATUS_MAX_ROWS:
        rows = ["... (l: the whole message in the log)"] + rows[-(STATUS_MAX_ROWS - 1):]
    return rows


def draw_status(m, width, height):
    st = m.status
    style = {"error": "class:status.error", "warn": "class:status.warn"}.get(st.kind,
                                                                          "class:status")
    return [_fit([(style, " " + row)], width, style) for row in status_lines(m, width)][:height]


def draw_log(m, width, height):
    """Every message with its time, wrapped; the newest at the bottom unless scrolled."""
    text = []
    for line in m.log.lines():
        text += textwrap.wrap(line, width, subsequent_indent=" " * 17,
                              break_on_hyphens=False) or [""]
    rows = max(1, height - 1)
    top = max(0, len(text) - rows) if m.log_top is None else m.log_top
    top = max(0, min(top, max(0, len(text) - rows)))
    lines = [_fit([("class:help", line)], width, "class:help") for line in text[top:top + rows]]
    foot = f" -- message log, {len(m.log.entries)} messages: Up/Down/PgUp/PgDn scroll, Esc closes --"
    lines.append(_fit([("class:head", foot)], width, "class:head"))
    return lines


def draw_too_small(m, width, height):
    from prompt_toolkit.application.current import get_app

    size = get_app().output.get_size()
    msg = (f" the window is {size.columns}x{size.rows}: the console needs at least "
           f"{MIN_COLUMNS}x{MIN_ROWS} (columns x rows); enlarge it. m mutes, q quits.")
    return [_fit([("class:status.warn", row)], width, "class:status.warn")
            for row in textwrap.wrap(msg, max(10, width))][:height]


def _wrap(line, width):
    """Wrap a help line; continuation lines start under its description column."""
    if len(line) <= width:
        return [line]
    body = line.lstrip(" ")
    indent = len(line) - len(body)
    gap = re.search(r"\S( {2,})\S", body)
    hang = indent + gap.end(1) if gap else indent + (2 if body.startswith("- ") else 0)
    if hang > width - 20:
        hang = indent + 2
    return textwrap.wrap(line, width, subsequent_indent=" " * hang,
                         break_on_hyphens=False) or [""]


def draw_help(m, width, height):
    text = [w for line in m.help_lines() for w in _wrap(line, width)]
    rows = max(1, height - 1)
    m.help_top = max(0, min(m.help_top, max(0, len(text) - rows)))
    shown = text[m.help_top:m.help_top + rows]
    lines = [_fit([("class:help", line)], width, "class:help") for line in shown]
    more = len(text) - (m.help_top + rows)
    foot = f" -- {more} more lines: Down/PgDn --" if more > 0 else " -- end: Esc closes --"
    lines.append(_fit([("class:head", foot)], width, "class:head"))
    return lines


# ---------------------------------------------------------------------------------------------
# prompt_toolkit glue

class DrawnControl(UIControl):
    """A UIControl that asks ``draw(width, height)`` for its lines on every render."""

    def __init__(self, draw, focusable=False):
        self.draw = draw
        self._focusable = focusable

    def is_focusable(self):
        return self._focusable

    def create_content(self, width, height):
        try:
            lines = self.draw(width, height)
        except Exception as e:  # a panel must never take the console down
            lines = [[("class:status.error", f" panel error: {one_line(e)}"[:width])]]
        return UIContent(get_line=lambda i: lines[i] if i < len(lines) else [],
                         line_count=max(1, len(lines)), show_cursor=False)


@dataclass
class ConsoleLayout:
    """The built screen: the Layout and the pieces the actions need."""

    layout: Layout
    command: Buffer
    command_window: Window
    list_window: Window
    help_window: Window
    log_window: Window


def build_layout(m) -> ConsoleLayout:
    """Build the screen for model ``m``."""

    def panel(fn, **kw):
        return DrawnControl(lambda w, h: fn(m, w, h), **kw)

    command = Buffer(name="command", multiline=False)
    list_window = Window(panel(draw_params, focusable=True), width=D(min=22, preferred=32,
                                                                      max=34))
    curve_window = Window(panel(draw_curve))
    meters_window = Window(panel(draw_meters), height=D.exact(meter_line_count(m)))
    strip_window = Window(panel(draw_strip), height=D(min=1, preferred=2, max=2))
    help_window = Window(panel(draw_help, focusable=True))
    log_window = Window(panel(draw_log, focusable=True))
    small_window = Window(panel(draw_too_small))
    in_help = Condition(lambda: m.view == "help")
    in_log = Condition(lambda: m.view == "log")

    def _too_small():
        from prompt_toolkit.application.current import get_app

        try:
            size = get_app().output.get_size()
        except Exception:
            return False
        return size.columns < MIN_COLUMNS or size.rows < MIN_ROWS

    too_small = Condition(_too_small)
    main = HSplit([
        VSplit([list_window, Window(width=1, char="|", style="class:sep"), curve_window],
               height=D(min=4)),
        meters_window,
        strip_window,
    ])

    def status_height():
        from prompt_toolkit.application.current import get_app

        try:
            cols = get_app().output.get_size().columns
        except Exception:
            cols = 80
        return D.exact(len(status_lines(m, cols)))

    def prompt():
        if m.view == "command":
            return [("class:prompt", ": ")]
        return [("class:dim", "  ")]

    command_window = Window(BufferControl(buffer=command), height=1, style="class:cmd")
    hint = Window(FormattedTextControl(
        lambda: [] if m.view == "command" or command.text else
        [("class:dim", "Enter: value  :  command  - +: output  m: mute  l: log  ?: help  "
                       "q: quit")]),
        height=1)
    root = HSplit([
        Window(panel(draw_header), height=1),
        ConditionalContainer(main, filter=~in_help & ~in_log & ~too_small),
        ConditionalContainer(help_window, filter=in_help & ~too_small),
        ConditionalContainer(log_window, filter=in_log & ~too_small),
        ConditionalContainer(small_window, filter=too_small),
        Window(panel(draw_status), height=status_height),
        VSplit([Window(FormattedTextControl(prompt), width=2, height=1),
                ConditionalContainer(command_window, filter=Condition(
                    lambda: m.view == "command" or bool(command.text))),
                ConditionalContainer(hint, filter=Condition(
                    lambda: not (m.view == "command" or bool(command.text))))]),
    ])
    return ConsoleLayout(Layout(root, focused_element=list_window), command, command_window,
                         list_window, help_window, log_window)
