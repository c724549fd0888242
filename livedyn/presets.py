"""Presets: one algorithm with its parameter values, stored as a hand-editable TOML file.

File layout (format 1)
----------------------
::

    # any comment
    preset_format = 1                  # required: the layout version of this file
    algorithm = "compressor"           # a built-in algorithm (see livedyn.algorithms.names())
    # algorithm_file = "mine/soft.py"  # ... or a user algorithm file instead, relative to
    #                                  #     this preset's folder (exactly one of the two)
    description = "gentle vocal levelling"  # optional, one line

    [params]                           # optional; a parameter left out takes its default
    threshold = -18                    # numbers as numbers, in the parameter's unit
    ratio = "3:1"                      # ratios as "3:1", 3 or "inf" (TOML's inf works too)
    detector = "rms"                   # choices by name
    key_hpf = "off"                    # filters that can be switched off

Values are read with :meth:`livedyn.params.Param.parse`, so the forms the console accepts
("-18 dBFS", "10 ms", "on") are accepted here too.

Loading fills every parameter of a built-in algorithm that the file leaves out with the
algorithm's default, so ``Preset.values`` is a complete setting and applying it gives the same
result whatever was set before. With ``algorithm_file`` the schema is not known here (loading a
user algorithm is the algorithm loader's job): the values are checked against every parameter
livedyn knows (:data:`livedyn.params.ALL`) and only the ones in the file are returned; call
:meth:`Preset.checked` with the user algorithm's schema once it is loaded.

Every failure raises :class:`PresetError` with one line that starts with the file name, e.g.
``presets/x.toml:9: ratio = -3: out of range, expected 1 to inf``.

Writes are atomic (:func:`livedyn.files.write_text_atomic`): a temporary file in the target folder, flushed and
fsynced, then renamed onto the target, so a crash or error never leaves a half-written preset.
"""
from __future__ import annotations

import math
import os
import re
import tomllib
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import tomli_w

from . import algorithms
from . import files as _files
from .files import fsync_dir, write_text_atomic  # noqa: F401 (part of this module's API)
from .params import ALL, Param, ParamError, Schema
from .shipped import presets_folder

__all__ = [
    "FORMAT_VERSION",
    "Preset",
    "PresetError",
    "PresetWarning",
    "load",
    "save",
    "dumps",
    "list_presets",
    "presets_dir",
    "user_presets_dir",
    "user_preset_path",
    "write_text_atomic",
    "read_text_file",
]

#: The layout version this module writes and the only one it reads.
FORMAT_VERSION = 1
#: Suffix of preset files in the presets folder.
SUFFIX = ".toml"
#: Environment variable that points the name lookup at another presets folder.
ENV_DIR = "LIVEDYN_PRESETS"
#: Larger files are refused before parsing (a preset is a few hundred bytes).
MAX_BYTES = 1 << 20

_TOP_KEYS = ("preset_format", "algorithm", "algorithm_file", "description", "params")


class PresetError(ParamError):
    """A preset that cannot be read or written; the message is one line naming the file."""


class PresetWarning(UserWarning):
    """A broken preset skipped by :func:`list_presets`."""


@dataclass
class Preset:
    """One algorithm with its parameter values.

    Attributes
    ----------
    algorithm : str
        Built-in algorithm name; with ``algorithm_file``, the file's stem (a label only).
    values : dict
        Parameter name -> float as stored in the parameter array (choices as their index,
        an infinite ratio as ``math.inf``, a filter that is off as its off value).
    description : str
        One line for listings; may be empty.
    algorithm_file : pathlib.Path or None
        A user algorithm file (absolute, resolved against the preset's folder on load).
    source : pathlib.Path or None
        The file this preset was loaded from.
    """

    algorithm: str
    values: dict = field(default_factory=dict)
    description: str = ""
    algorithm_file: Path | None = None
    source: Path | None = None

    def schema(self) -> Schema:
        """The schema the values are checked against: the built-in's, or every parameter."""
        if self.algorithm_file is not None:
            return Schema(dict(ALL))
        return algorithms.get(self.algorithm).schema

    def checked(self, schema: Schema) -> "Preset":
        """Check the values against ``schema`` (e.g. a user algorithm's, once loaded).

        Raises PresetError (naming the source file) for a parameter the schema lacks or a value
        outside its range. Returns self so that calls can be chained.
        """
        where = str(self.source) if self.source is not None else "<preset>"
        for name, v in self.values.items():
            if name not in schema:
                raise PresetError(
                    f"{where}: params.{name}: not a parameter of {self.algorithm}, "
                    f"expected one of {', '.join(schema.names())}"
                )
            try:
                schema[name].check(v)
            except ParamError as e:
                raise PresetError(f"{where}: {e}") from None
        return self


# ---------------------------------------------------------------------------------------------
# Folder and name lookup


def presets_dir() -> Path:
    """The folder of shipped presets: ``$LIVEDYN_PRESETS`` or the package's ``presets/``."""
    env = os.environ.get(ENV_DIR)
    if env:
        return Path(env).expanduser()
    return presets_folder()


#: Environment variable that points at another folder of the user's own presets.
ENV_USER_DIR = "LIVEDYN_USER_PRESETS"


def user_presets_dir() -> Path:
    """The folder of the user's own presets: ``$LIVEDYN_USER_PRESETS``, else
    ``$XDG_DATA_HOME/livedyn/presets`` (``~/.local/share/livedyn/presets`` when
    ``XDG_DATA_HOME`` is unset or not absolute, per the XDG Base Directory Specification 0.8).
    It may not exist yet: :func:`user_preset_path` makes it."""
    env = os.environ.get(ENV_USER_DIR)
    if env:
        return Path(env).expanduser()
    xdg = os.environ.get("XDG_DATA_HOME", "")
    base = Path(xdg) if xdg and Path(xdg).is_absolute() else Path.home() / ".local" / "share"
    return base / "livedyn" / "presets"


def user_preset_path(name: str, make=True) -> Path:
    """Where ``save NAME`` writes the preset ``name``: ``NAME.toml`` in the user folder (made
    with its parents when ``make``). ``name`` must be a bare name: no folder, no suffix."""
    if not _is_bare_name(name):
        raise PresetError(f"{name!r}: expected a bare preset name (no folder, no suffix)")
    folder = user_presets_dir()
    if make:
        try:
            folder.mkdir(parents=True, exist_ok=True)
        except OSError as e:
            raise PresetError(f"{folder}: cannot make the user presets folder: "
                              f"{e.strerror or e}") from None
    return folder / (name + SUFFIX)


def is_shipped(path) -> bool:
    """True when ``path`` lies in the shipped presets folder (read-only to livedyn)."""
    try:
        return Path(path).resolve().parent == presets_dir().resolve()
    except OSError:
        return False


def _is_bare_name(x) -> bool:
    if not isinstance(x, str):
        return False
    if not x or x in (".", "..") or "/" in x or "\\" in x:
        return False
    return Path(x).suffix == ""


def _resolve(path_or_name) -> Path:
    if _is_bare_name(path_or_name):  # the user's own first, then the shipped ones
        folders = [user_presets_dir(), presets_dir()]
        for folder in folders:
            p = folder / (path_or_name + SUFFIX)
            if p.exists():
                return p
        have = sorted({q.stem for f in folders if f.is_dir() for q in f.glob("*" + SUFFIX)})
        p = folders[-1] / (path_or_name + SUFFIX)
        raise PresetError(
            f"{p}: no preset named {path_or_name!r} in {folders[0]} or {folders[1]}, expected "
            f"one of {', '.join(have) if have else '(none: the folders have no presets)'}"
        )
    if isinstance(path_or_name, (str, os.PathLike)):
        return Path(path_or_name)
    raise PresetError(f"{path_or_name!r}: expected a preset name or a path to a preset file")


# ---------------------------------------------------------------------------------------------
# Text-file helpers (the shared ones live in livedyn.files)


def read_text_file(path, error=PresetError, what="preset", max_bytes=MAX_BYTES) -> str:
    """Read a small UTF-8 text file (see :func:`livedyn.files.read_text_file`), as a preset."""
    return _files.read_text_file(path, error, what, max_bytes)


# ---------------------------------------------------------------------------------------------
# Loading

_AT_RE = re.compile(r"\s*\(at line (\d+), column (\d+)\)\s*$")
_END_RE = re.compile(r"\s*\(at end of document\)\s*$")


def _toml_error(name: str, text: str, e: tomllib.TOMLDecodeError) -> PresetError:
    msg = str(e)
    m = _AT_RE.search(msg)
    if m:
        where = f"{name}:{m.group(1)}:{m.group(2)}"
        msg = msg[: m.start()]
    elif _END_RE.search(msg):
        where = f"{name}:{text.count(chr(10)) + 1}"
        msg = _END_RE.sub("", msg) + " (at end of file)"
    else:
        where = name
    msg = " ".join(msg.split())
    return PresetError(f"{where}: invalid TOML: {msg}")


def _key_line(text: str, table: str | None, key: str) -> int | None:
    """Line number of ``key = ...`` inside ``[table]`` (None: top level), if found once."""
    current = None
    found = []
    key_re = re.compile(r"^\s*(?:" + re.escape(key) + r"|\"" + re.escape(key) + r"\"|'"
                        + re.escape(key) + r"')\s*=")
    head_re = re.compile(r"^\s*\[\s*([^\[\]]+?)\s*\]")
    for i, line in enumerate(text.splitlines(), 1):
        h = head_re.match(line)
        if h:
            current = h.group(1).strip().strip("\"'")
            continue
        if current == table and key_re.match(line):
            found.append(i)
    return found[0] if len(found) == 1 else None


def _type_name(v) -> str:
    if isinstance(v, bool):
        return "a boolean"
    if isinstance(v, (int, float)):
        return "a number"
    if isinstance(v, str):
        return "text"
    if isinstance(v, dict):
        return "a table"
    if isinstance(v, list):
        return "an array"
    return "a date/time"


def load(path_or_name) -> Preset:
    """Load and fully validate a preset.

    Parameters
    ----------
    path_or_name : str or os.PathLike
        A bare name (no folder, no suffix, e.g. ``"vocal"``) is looked up as ``NAME.toml`` in
        :func:`user_presets_dir`, then in :func:`presets_dir`; anything else is read as a path.

    Returns
    -------
    Preset

    Raises
    ------
    PresetError
        One line starting with the file name (and line number where known).
    """
    path = _resolve(path_or_name)
    name = str(path)
    text = read_text_file(path, PresetError, "preset")
    from .limits import check_depth, check_doc, check_lines

    check_lines(name, text, PresetError)
    check_depth(name, text, PresetError)
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise _toml_error(name, text, e) from None
    except RecursionError:  # a backstop for the depth check
        raise PresetError(f"{name}: nested too deep, expected a flat preset") from None
    check_doc(name, doc, PresetError, lambda k: _key_line(text, None, k))
    return _from_doc(doc, path, text)


def _from_doc(doc: dict, path: Path, text: str) -> Preset:
    name = str(path)

    def fail(msg, table=None, key=None):
        line = _key_line(text, table, key) if key is not None else None
        where = f"{name}:{line}" if line else name
        return PresetError(f"{where}: {msg}")

    if not doc:
        raise PresetError(f"{name}: no settings (only comments), expected at least "
                          f"preset_format = {FORMAT_VERSION} and algorithm = \"...\"")
    # -- format version first: a newer layout may have keys this one does not know
    if "preset_format" not in doc:
        raise fail(f"missing key preset_format: expected preset_format = {FORMAT_VERSION} "
                   f"at the top of the file")
    ver = doc["preset_format"]
    if isinstance(ver, bool) or not isinstance(ver, int):
        raise fail(f"preset_format = {ver!r}: expected the whole number {FORMAT_VERSION}, "
                   f"got {_type_name(ver)}", None, "preset_format")
    if ver != FORMAT_VERSION:
        raise fail(f"preset_format = {ver}: unsupported version, expected {FORMAT_VERSION}",
                   None, "preset_format")
    for k in doc:
        if k not in _TOP_KEYS:
            raise fail(f"unknown key {k!r}: expected one of {', '.join(_TOP_KEYS)}", None, k)

    # -- algorithm or algorithm file
    has_alg, has_file = "algorithm" in doc, "algorithm_file" in doc
    if has_alg and has_file:
        raise fail("both algorithm and algorithm_file given: expected exactly one of them",
                   None, "algorithm_file")
    if not has_alg and not has_file:
        raise fail(f"missing key algorithm: expected algorithm = one of "
                   f"{', '.join(algorithms.names())} (or algorithm_file = \"path\")")
    algorithm_file = None
    if has_alg:
        alg = doc["algorithm"]
        if not isinstance(alg, str):
            raise fail(f"algorithm = {alg!r}: expected text naming one of "
                       f"{', '.join(algorithms.names())}, got {_type_name(alg)}",
                       None, "algorithm")
        try:
            algo = algorithms.get(alg)
        except ParamError as e:
            raise fail(f"algorithm = {alg!r}: unknown algorithm, expected one of "
                       f"{', '.join(algorithms.names())}", None, "algorithm") from e
        alg_name = algo.name
        schema = algo.schema
    else:
        af = doc["algorithm_file"]
        if not isinstance(af, str) or not af.strip():
            raise fail(f"algorithm_file = {af!r}: expected text with the path of an algorithm "
                       f"file, relative to this preset's folder", None, "algorithm_file")
        algorithm_file = (path.parent / Path(af.strip()).expanduser()).resolve()
        alg_name = algorithm_file.stem
        # a preset is data: the file is not imported here (its code runs only when the preset
        # is used, see render.algorithm_of). livedyn's parameters are checked now; names of the
        # file's own take numbers, checked against the file once it is loaded
        schema = Schema(dict(ALL))

    # -- description
    desc = doc.get("description", "")
    if not isinstance(desc, str):
        raise fail(f"description = {desc!r}: expected text, got {_type_name(desc)}",
                   None, "description")
    desc = " ".join(desc.split())

    # -- parameter values
    params = doc.get("params", {})
    if not isinstance(params, dict):
        raise fail(f"params = {params!r}: expected a table [params], got {_type_name(params)}",
                   None, "params")
    values = {}
    for k, raw in params.items():
        if algorithm_file is not None and k not in schema and k.isidentifier():
            if isinstance(raw, bool) or not isinstance(raw, (int, float)) or raw != raw:
                raise fail(f"params.{k} = {raw!r}: expected a number (a parameter of the "
                           "algorithm file's own)", "params", k)
            values[k] = float(raw)
            continue
        if k not in schema:
            what = f"a parameter of {alg_name}" if algorithm_file is None else "a parameter"
            raise fail(f"params.{k} = {raw!r}: not {what}, expected one of "
                       f"{', '.join(schema.names())}", "params", k)
        p = schema[k]
        if isinstance(raw, (dict, list)) or not isinstance(raw, (int, float, str, bool)):
            shown = repr(raw) if isinstance(raw, (dict, list)) else str(raw)  # dates as in TOML
            raise fail(f"{k} = {shown}: expected {_expected_form(p)}, got {_type_name(raw)}",
                       "params", k)
        try:
            values[k] = p.parse(raw)
        except ParamError as e:
            raise fail(str(e), "params", k) from None

    if algorithm_file is None:
        values = {p.name: values.get(p.name, p.default) for p in schema}
    return Preset(alg_name, values, desc, algorithm_file, path)


def _expected_form(p: Param) -> str:
    if p.taper == "choice":
        return "one of " + ", ".join(p.choices)
    if p.taper == "slope":
        return "a ratio such as 4, \"4:1\" or \"inf\""
    return "a number, " + _comment(p)


# ---------------------------------------------------------------------------------------------
# Saving


def _toml_value(p: Param, v: float):
    if p.taper == "choice":
        return p.choices[int(v)]
    if p.off_value is not None and v == p.off_value:
        return "off"
    if p.taper == "slope":
        if math.isinf(v):
            return "inf"
        return f"{int(v)}:1" if float(v).is_integer() else f"{float(v)!r}:1"
    v = float(v)
    if v.is_integer() and abs(v) < 2.0**53:
        return int(v)
    return v


def _comment(p: Param) -> str:
    rng = p.describe_range()
    rng = rng[len("expected "):] if rng.startswith("expected ") else rng
    return rng


def dumps(preset: Preset, path=None) -> str:
    """The TOML text :func:`save` writes for ``preset`` (``path``: where it will live).

    Values are checked first (a NaN or out-of-range value raises PresetError and nothing is
    written); each parameter line carries its range as a comment.
    """
    where = str(path) if path is not None else "<preset>"
    try:
        schema = preset.schema()
    except ParamError as e:
        raise PresetError(f"{where}: {e}") from None
    own = [k for k in preset.values if k not in schema and preset.algorithm_file is not None]
    for k in preset.values:
        if k not in schema and k not in own:
            raise PresetError(f"{where}: params.{k}: not a parameter of {preset.algorithm}, "
                              f"expected one of {', '.join(schema.names())}")
    top = {"preset_format": FORMAT_VERSION}
    if preset.algorithm_file is not None:
        af = Path(preset.algorithm_file)
        if path is not None and af.is_absolute():
            try:
                af = Path(os.path.relpath(af, Path(path).resolve().parent))
            except ValueError:  # another drive (Windows)
                pass
        top["algorithm_file"] = af.as_posix()
    else:
        top["algorithm"] = preset.algorithm
    if preset.description:
        top["description"] = " ".join(str(preset.description).split())

    lines = []
    for p in schema:
        if p.name not in preset.values:
            continue
        v = preset.values[p.name]
        try:
            v = p.check(v)
        except (ParamError, TypeError, ValueError) as e:
            raise PresetError(f"{where}: {e}") from None
        try:
            entry = tomli_w.dumps({p.name: _toml_value(p, v)}).rstrip("\n")
        except (TypeError, ValueError) as e:
            raise PresetError(f"{where}: {p.name} = {v!r}: cannot be written as TOML "
                              f"({' '.join(str(e).split())})") from None
        lines.append(f"{entry:<26} # {_comment(p)}")
    for k in own:  # the algorithm file's own parameters, checked when it is loaded
        v = float(preset.values[k])
        if not math.isfinite(v):
            raise PresetError(f"{where}: {k} = {v!r}: expected a finite number")
        lines.append(f"{tomli_w.dumps({k: v}).rstrip(chr(10)):<26} # the file's own")
    try:
        head = tomli_w.dumps(top)
    except (TypeError, ValueError) as e:
        raise PresetError(f"{where}: cannot be written as TOML ({' '.join(str(e).split())})"
                          ) from None
    text = (
        "# livedyn preset: values in each parameter's unit; the comment shows the range.\n"
        + head
        + "\n[params]\n"
        + "\n".join(lines)
        + ("\n" if lines else "")
    )
    return text


def save(preset: Preset, path) -> Path:
    """Write ``preset`` to ``path`` atomically; it loads back to identical values.

    On any failure (bad value, serialisation, disk) PresetError is raised, an existing file at
    ``path`` is left byte for byte as it was and no temporary file remains.
    """
    target = Path(path)
    name = str(path)
    problem = _files.target_problem(target, "preset file")
    if problem:
        raise PresetError(f"{name}: {problem}")
    from .outputs import OutputError, check_target

    try:  # only a regular file or a new name (never a FIFO or a device)
        check_target(target, "preset")
    except OutputError as e:
        raise PresetError(str(e)) from None
    text = dumps(preset, target)
    # Self-check: what we write must read back to the same values.
    back = _from_doc(tomllib.loads(text), target, text)
    for k, v in preset.values.items():
        b = back.values[k]
        if not (b == v or (math.isnan(b) and math.isnan(v))):
            raise PresetError(f"{name}: {k} = {v!r} would read back as {b!r}; not written")
    try:
        write_text_atomic(target, text)
    except OSError as e:
        raise PresetError(f"{name}: cannot write: {e.strerror or e}") from None
    return target


# ---------------------------------------------------------------------------------------------
# Listing


def list_presets(folder=None, on_error=None) -> list:
    """The presets in ``folder`` (default: the user's own folder and the shipped one, a user
    preset hiding a shipped one of the same name), sorted by name.

    Returns
    -------
    list of (name, description, algorithm)

    A file that does not load is skipped; its one-line error goes to ``on_error(message)``
    (default: a :class:`PresetWarning`). A missing folder gives an empty list.
    """
    if on_error is None:
        def on_error(msg):
            warnings.warn(msg, PresetWarning, stacklevel=3)
    if folder is None:  # the user's own, then the shipped ones they do not shadow
        out = list_presets(user_presets_dir(), on_error)
        mine = {n for n, _, _ in out}
        return sorted(out + [e for e in list_presets(presets_dir(), on_error)
                             if e[0] not in mine])
    folder = Path(folder)
    out = []
    if not folder.is_dir():
        return out
    for p in sorted(folder.glob("*" + SUFFIX)):
        try:
            pr = load(p)
        except ParamError as e:
            on_error(str(e))
            continue
        out.append((p.stem, pr.description, pr.algorithm))
    return out
