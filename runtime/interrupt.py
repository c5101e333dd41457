"""Ctrl-C during ``lesion run``: stop at the next safe point, never inside jax.

Python's default SIGINT handling raises ``KeyboardInterrupt`` wherever the main thread happens
to be, including inside jax's garbage-collection callbacks (where it is printed as "Exception
ignored" and lost, so the run went on and exited 0) and while XLA compiles in a second thread
(which was left running into interpreter shutdown and crashed it). So the handler only records the
request; the run checks it at safe points (between epochs, between groups, after a write) and
stops there by an ordinary exception, with every finished group already stored.

A second Ctrl-C means "now": the process ends at once with status 130. That loses nothing stored:
each group's files are replaced atomically, and a temporary file of a write in flight is removed
by the next writer.

This module imports nothing heavy: it is installed before jax is imported.
"""

from __future__ import annotations

import os
import signal
import threading

__all__ = ["Interrupted", "interrupt_guard"]


class Interrupted(Exception):
    """Ctrl-C was pressed; raised at a safe point, after every finished group was stored."""


class interrupt_guard:
    """While active, SIGINT sets :attr:`requested`; :meth:`check` raises :class:`Interrupted`
    once it is set. ``on_second`` is printed (to stderr) before a second Ctrl-C ends the process."""

    def __init__(self, on_second: str = "interrupted again: stopping at once"):
        self.requested = False
        self.on_second = on_second
        self._previous = None

    def _handle(self, signum, frame) -> None:
        if self.requested:
            try:
                # A progress display may have hidden the terminal's cursor; nothing else will show it.
                os.write(2, (b"\x1b[?25h" if os.isatty(2) else b"") + f"\n{self.on_second}\n".encode())
            finally:
                os._exit(130)
        self.requested = True

    def check(self) -> None:
        if self.requested:
            raise Interrupted()

    def __enter__(self) -> "interrupt_guard":
        # Only the main thread may install handlers; elsewhere (a caller's worker thread) SIGINT
        # never reaches this code anyway. An ignored SIGINT (a background job of a shell without
        # job control) stays ignored, as Python itself leaves it.
        if threading.current_thread() is threading.main_thread() and \
                signal.getsignal(signal.SIGINT) is not signal.SIG_IGN:
            self._previous = signal.signal(signal.SIGINT, self._handle)
        return self

    def __exit__(self, *exc) -> bool:
        if self._previous is not None:
            signal.signal(signal.SIGINT, self._previous)
        return False
