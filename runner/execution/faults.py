"""Fault injection for the robustness tests: make a worker die the way real ones do.

Set ``RECIPE_FAULT="MODE@EPOCH"`` (MODE: exit, segv, kill, hang; raise, an exception in
the job as a bug would raise; or stacked, an exception raised in the stacked backend only,
to test its visible fall-back) and optionally
``RECIPE_FAULT_ONCE=/path/marker``: then the fault fires only while the marker file does not
exist, and creates it, so the retry succeeds. Unset in normal use; costs one lookup per job.
"""

from __future__ import annotations

import os
import signal
import time
from dataclasses import dataclass

__all__ = ["Fault", "from_environment"]


@dataclass(frozen=True)
class Fault:
    mode: str
    epoch: int
    once: str | None

    def maybe_fire(self, epoch: int, stacked: bool = False) -> None:
        if epoch != self.epoch or (self.mode == "stacked" and not stacked):
            return
        if self.once:
            try:
                fd = os.open(self.once, os.O_CREAT | os.O_EXCL | os.O_WRONLY)
                os.close(fd)
            except FileExistsError:
                return
        if self.mode == "stacked":
            raise RuntimeError("fault injected into the stacked path")
        if self.mode == "raise":
            raise RuntimeError("fault injected into the job")
        if self.mode == "exit":
            os._exit(3)
        if self.mode == "segv":
            os.kill(os.getpid(), signal.SIGSEGV)
        if self.mode == "kill":
            os.kill(os.getpid(), signal.SIGKILL)
        if self.mode == "hang":
            while True:
                time.sleep(1)


def from_environment() -> Fault | None:
    spec = os.environ.get("RECIPE_FAULT")
    if not spec:
        return None
    mode, _, epoch = spec.partition("@")
    return Fault(mode=mode, epoch=int(epoch or 0), once=os.environ.get("RECIPE_FAULT_ONCE"))
