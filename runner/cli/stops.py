"""Signals that end a run early: Ctrl-C (SIGINT), SIGTERM (kill, a scheduler stopping the
job) and SIGHUP (the terminal closed). Each ends ``recipe run`` the same way: in-flight jobs
are abandoned, every finished job is already in the store, the lock is released, a line says
how to resume, and the exit status is 128 + the signal's number (130, 143, 129)."""

from __future__ import annotations

import signal

__all__ = ["Stopped", "exit_status", "stop_on_signals"]


class Stopped(KeyboardInterrupt):
    """A stop signal other than SIGINT, raised where the main thread is, as Ctrl-C would be:
    everything that cleans up after Ctrl-C cleans up after it too."""

    def __init__(self, signum: int):
        super().__init__(signal.Signals(signum).name)
        self.signum = signum


def _raise(signum, frame):
    raise Stopped(signum)


def stop_on_signals() -> None:
    """SIGTERM and SIGHUP stop the run like Ctrl-C (by default they kill Python at once,
    leaving workers to find out alone and no resume message)."""
    for sig in (signal.SIGTERM, getattr(signal, "SIGHUP", None)):
        if sig is not None:
            signal.signal(sig, _raise)


def exit_status(exc: KeyboardInterrupt) -> int:
    return 128 + getattr(exc, "signum", signal.SIGINT)
