"""The console's command line and the views it opens: typing a command or a value, Tab
completion, recalling earlier commands, running a command (:meth:`CommandLine._dispatch` maps
each verb of :mod:`livedyn.console.commands` to the model's action), and the help and
message-log views. Owns the :class:`CommandLine` part of the console model; the actions
themselves live in :mod:`livedyn.console.model`."""
from __future__ import annotations

from . import commands as cmds
from .messages import ConsoleError

HISTORY_DEPTH = 200


class CommandLine:
    """Command-line part of :class:`~livedyn.console.model.ConsoleModel` (a mixin: the model
    provides the actions and ``status``)."""

    def _init_command_line(self):
        self.history = []
        self._hist_i = 0
        self._hist_draft = ""
        self.help_top = 0
        self.log_top = None

    # ---- the command line ---------------------------------------------------------------------
    def begin_edit(self) -> str:
        """Open the command line for a value of the selected parameter; returns its text."""
        prm = self.param
        self.view = "command"
        self.info(f"type a value for {prm.name}: {prm.describe_range()} (now "
                  f"{prm.format(self.value(prm.name))}); Enter sets, Esc cancels")
        return prm.name + " "

    def begin_command(self) -> str:
        self.view = "command"
        self.info("type a command (Tab completes, Up/Down recall, Esc cancels, help lists all)")
        return ""

    def cancel_command(self):
        self.view = "list"
        self._hist_i = len(self.history)
        self.info("")

    def run_command(self, line) -> None:
        """Run one command line; the outcome is in :attr:`status`, never an exception."""
        text = " ".join(str(line).split())
        self.view = "list"
        if text:
            if not self.history or self.history[-1] != text:
                self.history.append(text)
                del self.history[:-HISTORY_DEPTH]
        self._hist_i = len(self.history)
        try:
            cmd = cmds.parse(text, self.names)
            if cmd is not None:
                self._dispatch(cmd)
        except Exception as e:
            self.fail(e)

    def _dispatch(self, cmd):
        v, arg = cmd.verb, cmd.arg
        onoff = {"on": True, "off": False, "": None}
        simple = {"compare": self.compare, "undo": self.undo, "redo": self.redo,
                  "help": self.open_help, "log": self.open_log, "reset": self.reset_counters}
        if v == "set":
            self.select(cmd.name)
            self.set_param(cmd.name, arg)
        elif v in simple:
            simple[v]()
        elif v == "load":
            self.load(arg)
        elif v == "save":
            self.save(arg)
        elif v == "bypass":
            self.set_bypass(onoff[arg])
        elif v == "mute":
            self.set_mute(onoff[arg])
        elif v == "monitor":
            self.set_monitor(arg)
        elif v == "slot":
            self.switch_slot(arg)
        elif v == "match":
            self.set_match(arg != "off")
        elif v == "output":
            self.set_output_level(arg)
        elif v == "algorithm":
            self.change_algorithm(arg)
        elif v == "precision":
            self.change_precision(arg)
        elif v == "source":
            self.set_source(arg)
        elif v == "learn":
            self.learn(arg or None)
        elif v == "forget":
            self.forget(arg or None)
        elif v == "mappings":
            self.mappings_command(arg)
        elif v == "midi":
            self.midi_port(arg)
        elif v == "quit":  # typed out in full: that is the confirmation
            self.quit_requested = True
            self.info("quit")
        else:  # parse() only returns the verbs above
            raise ConsoleError(f"unknown command {v!r}")

    def complete(self, line) -> str:
        """Complete the last word of ``line``; several fits are listed in the status line."""
        try:
            c = cmds.complete(line, self.schema, self.preset_names())
        except Exception as e:
            self.fail(e)
            return line
        if len(c.candidates) > 1:
            shown = c.candidates[:12]
            more = len(c.candidates) - len(shown)
            self.info("  ".join(shown) + (f"  (+{more} more)" if more else ""))
        elif not c.candidates:
            self.warn("no completion")
        return c.line

    def history_back(self, current="") -> str:
        if not self.history:
            return current
        if self._hist_i >= len(self.history):
            self._hist_draft = current
        self._hist_i = max(0, self._hist_i - 1)
        return self.history[self._hist_i]

    def history_forward(self, current="") -> str:
        if self._hist_i >= len(self.history):
            return current
        self._hist_i += 1
        if self._hist_i >= len(self.history):
            return self._hist_draft
        return self.history[self._hist_i]

    # ---- help ---------------------------------------------------------------------------------
    def help_lines(self):
        return cmds.help_lines(self.schema, self.algorithm.name)

    def open_help(self):
        self.view = "help"
        self.help_top = 0
        self.info("help: Up/Down/PgUp/PgDn scroll, Esc closes")

    def close_help(self):
        self.view = "list"
        self.info("")

    close_log = close_help

    def scroll_help(self, delta, rows=20):
        n = len(self.help_lines())
        self.help_top = max(0, min(max(0, n - rows), self.help_top + int(delta)))

    # ---- the message log ----------------------------------------------------------------------
    def open_log(self):
        self.view = "log"
        self.log_top = None  # None: follow the newest
        self.info("log: every message with its time; Up/Down/PgUp/PgDn scroll, Esc closes")

    def scroll_log(self, delta, rows=20):
        n = len(self.log.entries)
        top = max(0, n - rows) if self.log_top is None else self.log_top
        self.log_top = max(0, min(max(0, n - rows), top + int(delta)))
