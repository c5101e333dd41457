"""Where the ``lesion`` program starts: the console script (``lesion = "runtime.start:main"``) and
``python -m runtime.cli`` call :func:`stop_while_starting` before the command line's imports.

From then until a command begins, Ctrl-C ends the process at once with status 130: nothing is
computed yet. A ``KeyboardInterrupt`` raised there instead escaped every handler (in typer's lazy
import of pydantic while it builds the commands, in the module body after the imports, in ``main``)
and killed the interpreter by SIGINT, was turned by click's parsing into a silent exit 130, or was
lost in an importlib callback ("Exception ignored") while the run went on.
Only ``os`` and ``signal`` are imported here: until the handler is installed, Ctrl-C is Python's.
"""

from __future__ import annotations

import os
import signal

__all__ = ["main", "started", "stop_while_starting"]

_before_start = None  # the handler stop_while_starting replaced, until started() puts it back


def _stop_starting(signum, frame) -> None:
    try:
        os.write(2, b"interrupted\n")
    finally:
        os._exit(130)


def stop_while_starting() -> None:
    global _before_start
    # An ignored SIGINT (a background job of a shell without job control) stays ignored.
    if signal.getsignal(signal.SIGINT) is not signal.SIG_IGN:
        _before_start = signal.signal(signal.SIGINT, _stop_starting)


def started() -> None:
    """A command begins: Ctrl-C is handled as before :func:`stop_while_starting` (a command cleans
    up after a ``KeyboardInterrupt``; ``run`` installs :class:`runtime.interrupt.interrupt_guard`)."""
    global _before_start
    if _before_start is not None:
        signal.signal(signal.SIGINT, _before_start)
        _before_start = None


def main() -> None:
    stop_while_starting()
    from runtime.cli import main as command_line
    command_line()
