"""Key bindings of the console. Each handler is one call on the actions object (see
:class:`livedyn.console.app.Actions`); which keys are live depends on the model's view:
the parameter list, the command line, the help screen or the message log. A pending question
(quit, replace a preset) is answered by its own key (y, or q for quit); any other key on the
list says no and then does what it always does."""
from __future__ import annotations

from prompt_toolkit.filters import Condition
from prompt_toolkit.key_binding import KeyBindings


def build_keys(actions, model) -> KeyBindings:
    """Bindings for ``model`` (reads ``model.view``) calling ``actions``."""
    kb = KeyBindings()
    on_list = Condition(lambda: model.view == "list")
    on_cmd = Condition(lambda: model.view == "command")
    on_help = Condition(lambda: model.view == "help")
    on_log = Condition(lambda: model.view == "log")

    # ---- the parameter list ----------------------------------------------------------------
    kb.add("up", filter=on_list)(lambda e: actions.move(-1))
    kb.add("down", filter=on_list)(lambda e: actions.move(+1))
    kb.add("right", filter=on_list)(lambda e: actions.nudge(+1, False))
    kb.add("left", filter=on_list)(lambda e: actions.nudge(-1, False))
    kb.add("s-right", filter=on_list)(lambda e: actions.nudge(+1, True))
    kb.add("s-left", filter=on_list)(lambda e: actions.nudge(-1, True))
    kb.add("pageup", filter=on_list)(lambda e: actions.nudge(+1, True))
    kb.add("pagedown", filter=on_list)(lambda e: actions.nudge(-1, True))
    kb.add("enter", filter=on_list)(lambda e: actions.edit_selected())
    kb.add(":", filter=on_list)(lambda e: actions.open_command())
    kb.add("b", filter=on_list)(lambda e: actions.bypass())
    kb.add("m", filter=on_list)(lambda e: actions.mute())
    kb.add("c", filter=on_list)(lambda e: actions.compare())
    kb.add("u", filter=on_list)(lambda e: actions.undo())
    kb.add("r", filter=on_list)(lambda e: actions.redo())
    kb.add("-", filter=on_list)(lambda e: actions.step_output(-1))
    kb.add("+", filter=on_list)(lambda e: actions.step_output(+1))
    kb.add("=", filter=on_list)(lambda e: actions.step_output(+1))
    kb.add("L", filter=on_list)(lambda e: actions.learn())
    kb.add("l", filter=on_list)(lambda e: actions.open_log())
    kb.add("escape", filter=on_list, eager=True)(lambda e: actions.cancel_learn())
    kb.add("y", filter=on_list)(lambda e: actions.answer(True))
    kb.add("?", filter=on_list)(lambda e: actions.open_help())
    kb.add("q", filter=on_list)(lambda e: actions.quit())
    # while a question waits, a key with no binding of its own says no too (a stray key must
    # not leave the question armed for a later q)
    asked = Condition(lambda: model.question is not None)
    kb.add("<any>", filter=on_list & asked)(lambda e: actions.say_no())

    # ---- the command line ------------------------------------------------------------------
    kb.add("enter", filter=on_cmd)(lambda e: actions.submit())
    kb.add("escape", filter=on_cmd, eager=True)(lambda e: actions.cancel())
    kb.add("tab", filter=on_cmd)(lambda e: actions.complete())
    kb.add("up", filter=on_cmd)(lambda e: actions.history(-1))
    kb.add("down", filter=on_cmd)(lambda e: actions.history(+1))

    # ---- the help screen -------------------------------------------------------------------
    kb.add("up", filter=on_help)(lambda e: actions.scroll_help(-1))
    kb.add("down", filter=on_help)(lambda e: actions.scroll_help(+1))
    kb.add("pageup", filter=on_help)(lambda e: actions.scroll_help(-10))
    kb.add("pagedown", filter=on_help)(lambda e: actions.scroll_help(+10))
    for key in ("escape", "q", "?", "enter"):
        kb.add(key, filter=on_help, eager=True)(lambda e: actions.close_help())

    # ---- the message log -------------------------------------------------------------------
    kb.add("up", filter=on_log)(lambda e: actions.scroll_log(-1))
    kb.add("down", filter=on_log)(lambda e: actions.scroll_log(+1))
    kb.add("pageup", filter=on_log)(lambda e: actions.scroll_log(-10))
    kb.add("pagedown", filter=on_log)(lambda e: actions.scroll_log(+10))
    for key in ("escape", "q", "l", "enter"):
        kb.add(key, filter=on_log, eager=True)(lambda e: actions.close_log())

    # ---- anywhere --------------------------------------------------------------------------
    kb.add("f1")(lambda e: actions.open_help())
    kb.add("f2")(lambda e: actions.mute())
    kb.add("c-c")(lambda e: actions.quit())
    return kb
