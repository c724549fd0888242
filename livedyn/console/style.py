"""Colours of the console: one plain scheme, by class name (see layout.py for where each is
used). Levels go green, then amber from -18 dBFS, then red from -3 dBFS."""
from __future__ import annotations

from prompt_toolkit.styles import Style

CLASSES = {
    "title": "bg:#303a46 #e8e8e8",
    "title.slot": "bg:#4d6a86 #ffffff bold",
    "title.bypass": "bg:#b08800 #000000 bold",
    "title.mute": "bg:#b03030 #ffffff bold",
    "title.warn": "bg:#303a46 #ffcc55",
    "title.match": "bg:#2f6d4f #ffffff",
    "head": "#9ab4cc bold",
    "param": "",
    "param.sel": "reverse",
    "label": "#9ab4cc",
    "value": "",
    "dim": "#7a7a7a",
    "sep": "#4a4a4a",
    "bar.edge": "#7a7a7a",
    "bar.empty": "#3c3c3c",
    "meter.low": "#44c060",
    "meter.mid": "#e0b030",
    "meter.high": "#e04040 bold",
    "hold": "#ffffff bold",
    "gr": "#d08040",
    "plot": "",
    "axis": "#7a7a7a",
    "unity": "#505050",
    "curve": "#60a8e0 bold",
    "thresh": "#705050",
    "point": "#ffffff bg:#a03030 bold",
    "status": "",
    "status.warn": "#ffcc55",
    "status.error": "#ff6060 bold",
    "prompt": "#9ab4cc bold",
    "cmd": "",
    "help": "",
}


def build_style() -> Style:
    """The console's Style."""
    return Style.from_dict(CLASSES)
