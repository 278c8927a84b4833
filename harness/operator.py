"""The person at the mat: prompts, the safety note, and the yes before a real robot moves."""

from __future__ import annotations

from collections.abc import Callable

from harness.errors import TrackproofError
from harness.session import Session

Ask = Callable[[str], str]

SAFETY_NOTE = ("Safety: a real robot moves on its own. Keep fingers and loose cables clear, run it "
               "on the floor or a mat with edges, never leave lithium batteries charging or running "
               "unattended, and follow your venue's and the manufacturer's rules.")


class OperatorStopped(TrackproofError):
    """The operator chose to stop at a prompt (or could not answer it); nothing more moves."""

    exit_code = 130


def ask_operator(prompt: str) -> str:
    """input(), except that a closed input (unattended, piped) is a clear stop, not a traceback."""
    try:
        return input(prompt)
    except EOFError:
        raise OperatorStopped("no one answered the prompt (input is closed); nothing more moves") from None


def confirm_real(session: Session, plan: str, ask: Ask) -> None:
    """On real hardware (a hub not reporting itself simulated), say what the robot is about to do
    and wait for a yes."""
    hub = session.hub
    if hub is None or hub.board.get("simulated"):
        return
    answer = ask(f"{plan}\nThe robot will move by itself. Stop it at any time with Ctrl-C (or the hub's "
                 f"stop button, if it has one).\n{SAFETY_NOTE}\nType yes to start: ")
    if answer.strip().lower() not in ("y", "yes"):
        raise OperatorStopped("not started; nothing moved")
