"""Assembly: model, layout, keys and style into one prompt_toolkit Application.

>>> run_console(engine, title="rehearsal")   # blocks until quit; stops nothing itself

:func:`build_app` gives the Application without running it (tests pass a pipe input and a
dummy or captured output); :func:`screen_text` renders its screen to plain text.
"""
from __future__ import annotations

import asyncio
import functools
import os
import sys
from pathlib import Path

from prompt_toolkit.application import Application
from prompt_toolkit.application.current import set_app
from prompt_toolkit.document import Document
from prompt_toolkit.layout.mouse_handlers import MouseHandlers
from prompt_toolkit.layout.screen import Char, Screen, WritePosition

from .keys import build_keys
from .layout import build_layout
from .model import ConsoleModel
from .style import build_style

#: Meter refresh rate, Hz (at least 20; each redraw of a 120x40 screen costs some ms of CPU
#: that a 2-core machine shares with the audio server).
REFRESH_HZ = 20.0


#: Actions that answer a pending question themselves; any other action first says no to it.
_ANSWERS = {"quit", "answer"}


def _guarded(method):
    """Run an action; anything it raises becomes the status line instead. A pending question
    is answered no by any action but its own answer."""

    @functools.wraps(method)
    def run(self, *args):
        try:
            if self.model.question is not None and method.__name__ not in _ANSWERS:
                self.model.answer(False)
            method(self, *args)
        except Exception as e:
            self.model.fail(e)
        self.sync_focus()
        if self.model.quit_requested:
            self._exit()

    return run


class Actions:
    """What the keys do: each is a call on the model plus keeping the widgets in step."""

    def __init__(self, model: ConsoleModel, ui, app=None):
        self.model = model
        self.ui = ui
        self.app = app

    def sync_focus(self):
        """Focus the window that belongs to the model's view."""
        target = {"command": self.ui.command_window, "help": self.ui.help_window,
                  "log": self.ui.log_window}.get(
            self.model.view, self.ui.list_window)
        layout = self.ui.layout
        if layout.current_window is not target:
            try:
                layout.focus(target)
            except ValueError:  # not visible yet; the next render focuses it
                pass

    def _set_text(self, text):
        self.ui.command.set_document(Document(text, len(text)), bypass_readonly=True)

    @_guarded
    def move(self, delta):
        self.model.move(delta)

    @_guarded
    def nudge(self, direction, coarse):
        self.model.nudge(direction, coarse)

    @_guarded
    def edit_selected(self):
        self._set_text(self.model.begin_edit())

    @_guarded
    def open_command(self):
        self._set_text(self.model.begin_command())

    @_guarded
    def submit(self):
        text = self.ui.command.text
        self._set_text("")
        self.model.run_command(text)

    @_guarded
    def cancel(self):
        self._set_text("")
        self.model.cancel_command()

    @_guarded
    def complete(self):
        self._set_text(self.model.complete(self.ui.command.text))

    @_guarded
    def history(self, direction):
        text = self.ui.command.text
        self._set_text(self.model.history_back(text) if direction < 0 else
                       self.model.history_forward(text))

    @_guarded
    def bypass(self):
        self.model.set_bypass(None)

    @_guarded
    def mute(self):
        self.model.set_mute(None)

    @_guarded
    def compare(self):
        self.model.compare()

    @_guarded
    def undo(self):
        self.model.undo()

    @_guarded
    def open_help(self):
        self.model.open_help()

    @_guarded
    def close_help(self):
        self.model.close_help()

    @_guarded
    def scroll_help(self, delta):
        self.model.scroll_help(delta, rows=self._rows() - 4)

    @_guarded
    def redo(self):
        self.model.redo()

    @_guarded
    def step_output(self, direction):
        self.model.step_output(direction)

    @_guarded
    def learn(self):
        self.model.learn(None)

    @_guarded
    def cancel_learn(self):
        midi = getattr(self.model.controls, "midi", None)
        if midi is not None and midi.learning is not None:
            midi.cancel_learn()
            self.model.info("learn cancelled")

    @_guarded
    def say_no(self):
        """Any other key while a question waits: the guard has answered no."""

    @_guarded
    def answer(self, yes):
        if not self.model.answer(yes):
            self.model.info("no question is waiting for an answer")

    @_guarded
    def open_log(self):
        self.model.open_log()

    @_guarded
    def close_log(self):
        self.model.close_log()

    @_guarded
    def scroll_log(self, delta):
        self.model.scroll_log(delta, rows=self._rows() - 4)

    @_guarded
    def quit(self):
        self.model.request_quit()

    def _rows(self):
        try:
            return self.app.output.get_size().rows
        except Exception:
            return 24

    def _exit(self):
        app = self.app
        if app is not None and app.is_running and not app.future.done():
            app.exit()


async def _meter_task(app, model, period, quit_after=None):
    """Read the meters and redraw every ``period`` seconds until the app ends (or, with
    ``quit_after``, until that many seconds have passed)."""
    end = None if quit_after is None else model.clock() + float(quit_after)
    while True:
        model.tick()
        if end is not None and model.clock() >= end:
            model.quit_requested = True  # the time given is up: no question
            if app.is_running and not app.future.done():
                app.exit()
            return
        app.invalidate()
        await asyncio.sleep(period)


def build_app(engine, input=None, output=None, title="livedyn console", check=None,
              model=None, refresh_hz=REFRESH_HZ, quit_after=None, controls=None) -> Application:
    """The console as an Application, not yet running.

    Parameters
    ----------
    engine : object
        The engine's control surface (see :mod:`livedyn.console.model`).
    input, output : prompt_toolkit Input / Output, optional
        Default: the terminal. Tests pass ``create_pipe_input()`` and a ``DummyOutput`` or a
        ``Vt100_Output`` writing to a StringIO.
    title : str
        Shown in the header.
    check : callable, optional
        Returns None while all is well or a one-line message (see ConsoleModel).
    model : ConsoleModel, optional
        Use this model (tests build their own to inspect it).
    refresh_hz : float
        Meter refresh rate.
    quit_after : float, optional
        Leave by itself after this many seconds (for scripted runs).
    controls : livedyn.control.hub.Controls, optional
        MIDI and OSC: their changes show in the console, learn maps MIDI controls.

    Returns
    -------
    prompt_toolkit.application.Application
        With the model as ``.console_model``.
    """
    model = model if model is not None else ConsoleModel(engine, title=title, check=check,
                                                         controls=controls)
    ui = build_layout(model)
    actions = Actions(model, ui)
    app = Application(layout=ui.layout, key_bindings=build_keys(actions, model),
                      style=build_style(), full_screen=True, mouse_support=False,
                      input=input, output=output)
    app.ttimeoutlen = 0.05  # a lone Esc acts at once
    app.timeoutlen = 0.3
    actions.app = app
    period = 1.0 / float(refresh_hz)
    app.pre_run_callables.append(
        lambda: app.create_background_task(_meter_task(app, model, period, quit_after)))
    if controls is not None:
        controls.attach_console()  # actions from MIDI/OSC now run in the console
        controls.console_state = lambda: {"slot": model.active}  # for OSC queries
    app.console_model = model
    app.console_actions = actions
    return app


def run_console(engine, title="livedyn console", check=None, quit_after=None, refresh_hz=20,
                controls=None):
    """Run the console on the terminal until the user quits (or ``quit_after`` seconds).

    The engine keeps running: its owner stops it afterwards. ``check`` is called on every
    meter refresh and returns None or a one-line problem to show (see ConsoleModel).
    Returns the model (its state at quit)."""
    app = build_app(engine, title=title, check=check, quit_after=quit_after,
                    refresh_hz=refresh_hz, controls=controls)
    with _stderr_to_file() as where:
        app.run()
    if where is not None and where[1] < _size(where[0]):
        print(f"(messages from libraries while the console ran are in {where[0]})")
    return app.console_model


def _size(path):
    try:
        return os.path.getsize(path)
    except OSError:
        return 0


class _stderr_to_file:
    """While the console runs, what C libraries write to file descriptor 2 (the ALSA library
    when a MIDI port list asks for its sequencer, JACK about its server) goes to
    ``$XDG_STATE_HOME/livedyn/console-stderr.log`` instead of over the screen. Yields
    ``(path, size before)``, or None when it could not be set up (nothing is redirected)."""

    def __enter__(self):
        self.saved = None
        xdg = os.environ.get("XDG_STATE_HOME", "")
        base = Path(xdg) if xdg and Path(xdg).is_absolute() else \
            Path.home() / ".local" / "state"
        path = base / "livedyn" / "console-stderr.log"
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
            fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o644)
        except OSError:
            return None
        before = _size(path)
        try:
            sys.stderr.flush()
            self.saved = os.dup(2)
            os.dup2(fd, 2)
        except OSError:
            self.saved = None
            return None
        finally:
            os.close(fd)
        return (path, before)

    def __exit__(self, *exc):
        if self.saved is not None:
            try:
                sys.stderr.flush()
            except Exception:
                pass
            os.dup2(self.saved, 2)
            os.close(self.saved)
        return False


def screen_to_text(screen, columns, rows) -> str:
    """The characters of a prompt_toolkit Screen as lines of text (trailing blanks cut)."""
    out = []
    for y in range(rows):
        row = screen.data_buffer[y]
        out.append("".join(row[x].char for x in range(columns)).rstrip())
    return "\n".join(out)


def screen_text(app, columns=80, rows=24) -> str:
    """Render ``app``'s layout at ``columns`` x ``rows`` into text, without a terminal."""
    screen = Screen(default_char=Char(" ", ""), initial_width=columns, initial_height=rows)
    with set_app(app):
        app.layout.container.write_to_screen(screen, MouseHandlers(),
                                             WritePosition(0, 0, columns, rows), "",
                                             erase_bg=False, z_index=None)
        screen.draw_all_floats()
    return screen_to_text(screen, columns, rows)
