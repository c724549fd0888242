"""The console's command line: parsing, completion words and the help text.

A command line is one of

* ``NAME VALUE`` or ``NAME=VALUE``: set a parameter of the running algorithm
  (``threshold -18``, ``ratio 4:1``, ``key external``, ``key_hpf off``);
* a verb from :data:`VERBS` with its argument (``load NAME|FILE``, ``slot b``, ...).

Names and verbs may be shortened to any unique prefix (``thr -18``). Nothing here knows a
screen or an engine: :func:`parse` turns text into a :class:`Command` or raises
:class:`CommandError` with one line saying what was wrong and what is allowed;
:func:`complete` extends a partly typed line.
"""
from __future__ import annotations

import math
import os
from dataclasses import dataclass
from pathlib import Path

from ..params import format_number

#: Verb -> (argument form, one-line meaning), in help order.
VERBS = {
    "load": ("NAME|FILE", "apply a preset by name (your own, saved with 'save NAME', or a "
                          "shipped one) or a preset file (undo reverts it)"),
    "save": ("NAME|FILE", "write the active slot's values: a bare NAME goes to your presets "
                          "folder, anything else is a file (.toml added); asks before "
                          "replacing; shipped presets are never written"),
    "bypass": ("[on|off]", "pass the input through unprocessed (no argument: toggle)"),
    "mute": ("[on|off]", "silence every output (no argument: toggle)"),
    "monitor": ("out|key|delta", "what you hear: the output, the key input, or the delta "
                                 "(what the processor removes)"),
    "output": ("DB|off", "output (monitor) level of the device outputs, -60 to 0 dB or off; "
                         "meters and recordings are taken before it"),
    "slot": ("a|b", "switch to settings slot A or B (each keeps its own values and undo)"),
    "compare": ("", "switch to the other slot"),
    "match": ("[on|off]", "level-matched comparison: trim the louder slot by the loudness "
                          "difference ('match' alone: on, or measure again)"),
    "undo": ("", "put back the values before the last change on this slot"),
    "redo": ("", "put back what the last undo took away"),
    "algorithm": ("NAME|FILE", "change the running algorithm (built-in name or algorithm file), "
                               "crossfaded in; shared parameters keep their values"),
    "precision": ("float64|float32", "compile the running algorithm in that precision (off "
                                     "the audio thread) and crossfade to it"),
    "source": ("main|key KIND ...", "switch a test source: tone [HZ [DBFS]], pink [DBFS], "
                                    "white [DBFS], sweep [F1 [F2 [SECONDS [DBFS]]]], bursts "
                                    "[HZ [HIGH [LOW [ON_MS [OFF_MS]]]]], input (the run's own); "
                                    "never above -6 dBFS"),
    "reset": ("", "count late and flagged blocks from 0 again"),
    "learn": ("[TARGET]", "MIDI learn: the next control you move drives TARGET (default the "
                          "chosen parameter; also output_level, mute, bypass, slot, compare, "
                          "'preset NAME')"),
    "forget": ("[TARGET]", "remove the MIDI mappings of TARGET (default the chosen parameter)"),
    "mappings": ("save|load FILE", "write or read the MIDI mappings (a TOML file)"),
    "midi": ("[PORT|off]", "read MIDI from another input port (index, name or a unique part; "
                           "the mappings stay); no argument: list the ports"),
    "log": ("", "every message so far, with its time"),
    "help": ("", "show this help"),
    "quit": ("", "leave now, without the question q asks while sound plays (the engine stops "
                 "when its owner stops it)"),
}
#: Words a verb accepts (None: free text such as a file name).
VERB_WORDS = {
    "load": None, "save": None, "algorithm": None, "source": None, "mappings": None,
    "learn": None, "forget": None, "output": None, "midi": None,
    "bypass": ("on", "off"), "mute": ("on", "off"), "match": ("on", "off"),
    "monitor": ("out", "key", "delta"), "slot": ("a", "b"),
    "precision": ("float64", "float32"),
    "compare": (), "undo": (), "redo": (), "reset": (), "log": (), "help": (), "quit": (),
}
#: Verbs whose argument may be left out.
OPTIONAL_ARG = {"bypass", "mute", "match", "learn", "forget", "midi"}


class CommandError(ValueError):
    """A command line that cannot be used; the message is one line for the status area."""


@dataclass(frozen=True)
class Command:
    """A parsed command line.

    Attributes
    ----------
    verb : str
        One of :data:`VERBS`, or ``"set"`` for a parameter change.
    arg : str
        The argument as typed (stripped); for ``set``, the value text.
    name : str
        For ``set``: the full parameter name.
    """

    verb: str
    arg: str = ""
    name: str = ""


def _resolve(word: str, names) -> str | None:
    """``word`` itself if it is in ``names``, else the one name it is a prefix of."""
    if word in names:
        return word
    hits = [n for n in names if n.startswith(word)]
    if len(hits) == 1:
        return hits[0]
    if len(hits) > 1:
        raise CommandError(f"{word!r} could be {', '.join(hits)}: type more letters")
    return None


def parse(line: str, param_names) -> Command | None:
    """Parse one command line.

    Parameters
    ----------
    line : str
        What was typed.
    param_names : sequence of str
        Parameters of the running algorithm, in display order.

    Returns
    -------
    Command or None
        None for an empty line.

    Raises
    ------
    CommandError
        One line naming the word that was wrong and what is allowed.
    """
    text = " ".join(str(line).split())
    if not text:
        return None
    head, sep, rest = text.partition(" ")
    if "=" in head:  # threshold=-18, or "threshold= -18"
        head, _, first = head.partition("=")
        rest = (first + " " + rest).strip()
    elif rest.startswith("="):
        rest = rest[1:].strip()
    word = head.lower()
    params = list(param_names)
    if word == "set":
        if not rest:
            raise CommandError(f"set: give a parameter and a value, e.g. set {params[0]} ..."
                               if params else "set: this algorithm has no parameters")
        return parse(rest, params)
    verbs = list(VERBS)
    if word in params:
        return _param_command(word, rest, params)
    if word in verbs:
        return _verb_command(word, rest)
    # unique prefix among everything that can start a line
    hit = _resolve(word, verbs + params)
    if hit is None:
        if word == "key":
            raise CommandError("key: this algorithm has no key input choice (no 'key' "
                               "parameter); type help for what it has")
        raise CommandError(
            f"unknown command {head!r}: expected a parameter ({', '.join(params[:6])}"
            f"{', ...' if len(params) > 6 else ''}) or one of {', '.join(verbs)}; type help")
    if hit in params:
        return _param_command(hit, rest, params)
    return _verb_command(hit, rest)


def _param_command(name: str, rest: str, params) -> Command:
    if not rest:
        raise CommandError(f"{name}: give a value, e.g. '{name} VALUE' (Enter on the list "
                           "shows the allowed range)")
    return Command("set", rest, name)


def _verb_command(verb: str, rest: str) -> Command:
    form = VERBS[verb][0]
    words = VERB_WORDS[verb]
    if words is None:
        if not rest and verb in OPTIONAL_ARG:
            return Command(verb)
        if not rest:
            raise CommandError(f"{verb}: missing {form}, e.g. '{verb} {form.split('|')[0]}'")
        return Command(verb, rest)
    if words == ():
        if rest:
            raise CommandError(f"{verb} takes no argument, got {rest!r}")
        return Command(verb)
    if not rest:
        if verb in OPTIONAL_ARG:
            return Command(verb)
        raise CommandError(f"{verb}: missing argument, expected {verb} {form}")
    arg = rest.lower()
    if arg not in words:
        raise CommandError(f"{verb} {rest!r}: expected {verb} {form}")
    return Command(verb, arg)


# ---------------------------------------------------------------------------------------------
# Completion


@dataclass(frozen=True)
class Completion:
    """Result of :func:`complete`: the new line and the words that fitted."""

    line: str
    candidates: tuple


def value_words(prm) -> tuple:
    """Words a parameter accepts besides numbers (choices, 'off', 'inf')."""
    if prm.taper == "choice":
        return tuple(prm.choices)
    words = []
    if prm.off_value is not None:
        words.append("off")
    if prm.taper == "slope" or math.isinf(prm.hi):
        words.append("inf")
    return tuple(words)


def _common_prefix(words) -> str:
    if not words:
        return ""
    return os.path.commonprefix(list(words))


def _path_candidates(partial: str, suffixes=(".toml",)) -> list:
    """Entries of the folder ``partial`` points into whose names start with its last part;
    folders end in '/', files are kept only with one of ``suffixes``."""
    expanded = os.path.expanduser(partial)
    folder, _, stem = expanded.rpartition("/")
    shown_folder = partial[: len(partial) - len(stem)]
    where = Path(folder + "/" if folder or partial.startswith("/") else ".")
    try:
        entries = sorted(os.listdir(where))
    except OSError:
        return []
    out = []
    for e in entries:
        if not e.startswith(stem) or (e.startswith(".") and not stem.startswith(".")):
            continue
        full = where / e
        if full.is_dir():
            out.append(shown_folder + e + "/")
        elif not suffixes or full.suffix in suffixes:
            out.append(shown_folder + e)
    return out


def complete(line: str, schema, preset_names=()) -> Completion:
    """Extend a partly typed command line.

    The last word is completed: the first word against verbs and parameter names, a second
    word against what that verb or parameter accepts (choices, on/off, slot letters, preset
    names and ``.toml`` files for ``load``, files for ``save``). One fitting word is completed
    in full (with a space after it, or '/' after a folder); several are completed to their
    common beginning.

    Parameters
    ----------
    line : str
        The text typed so far.
    schema : livedyn.params.Schema
        Parameters of the running algorithm.
    preset_names : sequence of str
        Shipped preset names offered after ``load``.
    """
    names = schema.names()
    if " " not in line.lstrip():
        partial = line.lstrip().lower()
        cands = [w for w in list(VERBS) + names if w.startswith(partial)]
        return _finish("", partial, cands)
    lead = line[: len(line) - len(line.lstrip())]
    body = line.lstrip()
    head, _, rest = body.partition(" ")
    if " " in rest.strip():
        return Completion(line, ())  # only one argument is ever needed
    prefix = lead + head + " " + rest[: len(rest) - len(rest.lstrip())]
    partial = rest.lstrip()
    word = head.lower()
    try:
        if word in names or word in VERBS:
            hit = word
        else:
            hit = _resolve(word, list(VERBS) + names)
    except CommandError:
        hit = None
    if hit is None:
        return Completion(line, ())
    if hit in names:
        cands = [w for w in value_words(schema[hit]) if w.startswith(partial.lower())]
        return _finish(prefix, partial, cands)
    words = VERB_WORDS[hit]
    if words is None:
        cands = _path_candidates(partial, suffixes=(".toml",) if hit == "load" else ())
        if hit == "load" and "/" not in partial:
            cands = [n for n in preset_names if n.startswith(partial)] + cands
        return _finish(prefix, partial, cands, path=True)
    cands = [w for w in words if w.startswith(partial.lower())]
    return _finish(prefix, partial, cands)


def _finish(prefix: str, partial: str, cands, path=False) -> Completion:
    cands = list(dict.fromkeys(cands))
    if not cands:
        return Completion(prefix + partial, ())
    if len(cands) == 1:
        w = cands[0]
        tail = "" if (path and w.endswith("/")) else " "
        return Completion(prefix + w + tail, tuple(cands))
    common = _common_prefix(cands)
    return Completion(prefix + (common if len(common) > len(partial) else partial), tuple(cands))


# ---------------------------------------------------------------------------------------------
# Help

#: (keys, meaning) of the parameter list, in help order.
LIST_KEYS = (
    ("Up / Down", "choose a parameter (the list scrolls; n/N shows where you are)"),
    ("Left / Right", "small step down / up (follows the parameter's taper, see below)"),
    ("Shift+Left / Shift+Right, PgDn / PgUp", "large step down / up"),
    ("Enter", "type a value for the chosen parameter"),
    (":", "type a command"),
    ("- / +", "output level down / up by 1 dB (below -60 dB: off)"),
    ("b", "bypass on/off"),
    ("m, or F2 anywhere", "mute on/off: silences every output"),
    ("c", "compare: switch between slots A and B"),
    ("u / r", "undo / redo the last change on this slot"),
    ("L", "MIDI learn for the chosen parameter (then move a control)"),
    ("l", "the message log (every message with its time)"),
    ("y", "yes to a question in the message area (replace a preset, quit)"),
    ("?, or F1 anywhere", "this help (Esc, q or ? closes it; Up/Down/PgUp/PgDn scroll)"),
    ("q, or Ctrl+C anywhere", "quit; while sound plays it asks first: press it again"),
)
CMD_KEYS = (
    ("Enter", "run the command"),
    ("Tab", "complete the word (several fits are listed in the status line)"),
    ("Up / Down", "earlier / later commands"),
    ("Esc", "back to the parameter list"),
)

CAUTIONS = (
    "Monitoring cautions:",
    "  - Loud monitoring can damage hearing. Start with the monitor level down and raise it "
    "slowly; bypass, compare and changes of makeup or ratio can jump the level.",
    "  - A microphone near loudspeakers can howl (feedback): keep them apart, keep levels low "
    "and keep a hand on mute (m or F2).",
    "  - Follow the venue's rules and the practice licensed for public sound systems.",
)


def help_lines(schema, algorithm_name: str) -> list:
    """The help screen as plain lines: keys, commands, steps, level matching, parameters and
    the monitoring cautions."""
    out = [f"livedyn console help ({algorithm_name})", ""]
    out += list(CAUTIONS) + [""]
    out.append("Keys on the parameter list:")
    out += [f"  {k:<38} {v}" for k, v in LIST_KEYS]
    out += ["", "Keys on the command line:"]
    out += [f"  {k:<38} {v}" for k, v in CMD_KEYS]
    out += ["", "Commands (any unique beginning of a word works, e.g. 'thr -18'):"]
    out.append(f"  {'NAME VALUE or NAME=VALUE':<38} set a parameter, e.g. threshold -18, "
               "ratio 4:1, attack 5 ms")
    if "key" in schema:
        out.append(f"  {'key main|external':<38} what drives the detector")
    for verb, (form, meaning) in VERBS.items():
        out.append(f"  {(verb + ' ' + form).strip():<38} {meaning}")
    out += [
        "",
        "Steps of Left/Right (small) and Shift or PgUp/PgDn (large):",
        "  - dB and dBFS: 0.5 dB and 3 dB; %: 1 and 10; linear ms (lookahead): 0.1 and 1 ms.",
        "  - times and frequencies (log taper): x1.122 and x1.585 per step (20 and 5 steps per "
        "decade), rounded to 4 digits; below 0.1 ms a time goes to 0; a key filter below its "
        "lowest frequency goes off.",
        "  - ratio: the step is taken in slope space, on the output slope 1/ratio = 1 - s "
        "(s = 1 - 1/ratio, the slope the processor glides in): /1.122 and /1.585 per step, "
        "so the ratio moves geometrically; past 100:1 it becomes inf:1.",
        "  - choices: cycle through the list (a choice not allowed now is skipped and named).",
        "",
        "Slots and undo: A and B each keep every parameter value exactly; 'slot a', 'slot b', "
        "'compare' and the c key switch between them. Undo belongs to the slot it was made on.",
        "",
        "Level-matched comparison ('match on'): the last 4 s of input are processed offline "
        "with slot A's values and with slot B's; the integrated loudness of each result "
        "(ITU-R BS.1770-4) is measured and the louder slot is turned down by the difference, "
        "as an offset on its makeup. The header shows 'level matched by X dB' for the active "
        "slot and the makeup row shows the offset beside the value. The makeup you set is "
        "kept, saved and shown without the offset; 'match off' removes it. While on, it is "
        "measured again on each slot switch and each change, so the trim follows the most "
        "recent input.",
        "",
        "Parameters:",
    ]
    for p in schema:
        if p.taper == "choice":
            rng = "one of " + ", ".join(p.choices)
        else:
            hi = "inf" if math.isinf(p.hi) else format_number(p.hi)
            rng = f"{format_number(p.lo)} to {hi}{(' ' + p.unit) if p.unit else ''}"
            if p.off_value is not None:
                rng += " or off"
        out.append(f"  {p.name:<12} {rng}")
        out.append(f"  {'':<12}   {p.help}")
    out += ["", "The meters: peak (bar, with a hold mark '|'), RMS, momentary (400 ms) and "
            "short-term (3 s) loudness in LUFS and true peak in dBTP per ITU-R BS.1770-4 "
            "and EBU R 128; GR is gain reduction (it reads 'bypassed' while bypassed); load is "
            "the callback's share of the block period; late and flagged count blocks the "
            "stream was late for or reported as over- or underrun (reset sets them to 0); "
            "latency is the stream's input and output latency; lookahead is the processor's "
            "own delay. The output fader is the level of the device outputs, after the meters "
            "and recordings."]
    return out
