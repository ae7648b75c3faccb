"""Modal screens: keyboard help and the quit question when the tip is engaged."""

from __future__ import annotations

from textual.binding import Binding
from textual.containers import Horizontal, Vertical
from textual.screen import ModalScreen
from textual.widgets import Button, Static

#: The withdraw key. A control chord every terminal sends as one ASCII code (BEL), that no browser keeps for itself
#: (browser-based terminals lose ctrl+w, ctrl+t and ctrl+n to the browser) and that no input field uses for
#: editing, so it cannot be typed into a field by accident; it works in every view, also while typing.
WITHDRAW_KEY = "ctrl+g"

HELP = f"""\
[b]Keys[/b]  (ctrl+ keys work in every view, also while typing in a field)
  {WITHDRAW_KEY}  WITHDRAW now: cancel, retract Z, drive off, bias 0 V, field 0
          (or the red Withdraw button, top right)
  ctrl+x  cancel the running procedure; its guard withdraws
  1 … 7   views: 1 Probe 2 Resonance 3 Approach 4 Series 5 Analysis 6 Log 7 Fields
          (or click a tab); in a field the digits are typed instead
  esc     leave the field you are typing in: the number keys
          switch views again
  tab     next field or button (shift+tab back); enter presses a button
  ?       this help;  q or ctrl+q quit (asks first if the tip is engaged)

[b]Images[/b]  one shared scale centred on zero for every height:
  dark blue = negative phase = attractive, grey = zero,
  light amber = positive. Empty cells: lines not yet scanned.

esc or ? closes this help."""


class HelpScreen(ModalScreen[None]):
    BINDINGS = [Binding("escape,question_mark,q", "dismiss", "close")]
    DEFAULT_CSS = """
    HelpScreen { align: center middle; }
    HelpScreen > Static { width: 78; height: auto; max-height: 22; border: round $accent; padding: 0 1;
                          background: $surface; }
    """

    def compose(self):
        yield Static(HELP)

    def action_dismiss(self) -> None:
        self.dismiss(None)


class ConfirmQuit(ModalScreen[bool]):
    """Ask before quitting when the stage is engaged or a procedure runs: yes withdraws, then quits."""

    BINDINGS = [Binding("y", "answer(True)", "withdraw and quit"), Binding("n,escape", "answer(False)", "stay")]
    DEFAULT_CSS = """
    ConfirmQuit { align: center middle; }
    ConfirmQuit > Vertical { width: 60; height: auto; border: thick $warning; padding: 0 1; background: $surface; }
    ConfirmQuit Horizontal { height: auto; }
    """

    def __init__(self, reason: str) -> None:
        super().__init__()
        self.reason = reason

    def compose(self):
        with Vertical():
            yield Static(f"{self.reason}\nWithdraw the tip and quit?  [b]y[/b] yes / [b]n[/b] no")
            with Horizontal():
                yield Button("Withdraw and quit", id="yes", variant="warning")
                yield Button("Stay", id="no")

    def on_button_pressed(self, event: Button.Pressed) -> None:
        self.dismiss(event.button.id == "yes")

    def action_answer(self, answer: bool) -> None:
        self.dismiss(answer)
