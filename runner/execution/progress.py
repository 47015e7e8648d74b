"""Progress while a grid runs: one live line on a terminal, one line per job elsewhere."""

from __future__ import annotations

import statistics
import sys
import time

from runner.components.metrics import Goal
from runner.training.job import Status

__all__ = ["Progress"]


def _seconds(seconds: float) -> str:
    """A job's time: stacked jobs share their group's time and often take under 0.1 s each."""
    return f"{seconds:.3f}s" if seconds < 0.1 else f"{seconds:.1f}s"


def _clock(seconds: float) -> str:
    seconds = round(seconds)
    h, rest = divmod(seconds, 3600)
    m, s = divmod(rest, 60)
    return f"{h}:{m:02d}:{s:02d}" if h else f"{m}:{s:02d}"


class Progress:
    def __init__(
        self,
        total: int,
        metric: str,
        goal: str,
        stream=None,
        live: bool | None = None,
        quiet: bool = False,
        verbose: bool = False,
    ):
        self.verbose = verbose
        self.total = total
        self.metric = metric
        self.goal = goal
        self.stream = stream or sys.stderr
        self.live = self.stream.isatty() if live is None else live
        self.quiet = quiet
        self.start = time.monotonic()
        self.counts = dict.fromkeys(Status, 0)
        self.values: dict[str, list[float]] = {}
        self.finished = 0
        self.warned: set[str] = set()
        self.partial: dict[tuple[str, ...], float] = {}  # work items in flight: their job keys -> share done

    def note(self, text: str) -> None:
        """A line about the run as a whole, before its jobs' lines (not when quiet)."""
        if not self.quiet:
            self.stream.write(text + "\n")
            self.stream.flush()

    def warn(self, text: str) -> None:
        """A warning about how the run went, shown once even when quiet (a fast path that
        failed must show, not hide as a slower run)."""
        if text in self.warned:
            return
        self.warned.add(text)
        if self.live and self.finished:
            self.stream.write("\n")
        self.stream.write(f"warning: {text}\n")
        self.stream.flush()

    def advance(self, keys: tuple[str, ...], share: float) -> None:
        """A work item in flight (its jobs' keys) has done ``share`` of its epochs: the live
        line moves while a long stacked group trains, before any of its jobs finishes."""
        self.partial[keys] = share
        if self.live and not self.quiet:
            self._draw()

    def _done(self) -> float:
        """Jobs finished, counting those in flight by the share of their epochs done."""
        return self.finished + sum(len(keys) * share for keys, share in self.partial.items())

    def _draw(self) -> None:
        elapsed = time.monotonic() - self.start
        done = self._done()
        left = f"~{_clock(elapsed / done * (self.total - done))}" if done > 0 else "?"
        best = self._best()
        training = f" (+{done - self.finished:.1f} in training)" if self.partial else ""
        line = (
            f"[{self.finished}/{self.total}]{training} failed {self.counts[Status.FAILED]}, diverged "
            f"{self.counts[Status.DIVERGED]} | {_clock(elapsed)} elapsed, {left} left"
            + (f" | best {best[0]}: {best[1]:.4f}" if best else "")
        )
        self.stream.write("\r\033[K" + line)
        self.stream.flush()

    def update(
        self,
        label: str,
        seed: int,
        status: Status,
        value: float | None,
        seconds: float,
        error: str | None = None,
        key: str | None = None,
    ) -> None:
        status = Status(status)
        self.finished += 1
        self.counts[status] += 1
        self.partial = {keys: share for keys, share in self.partial.items() if key not in keys}
        if value is not None and status is Status.DONE:
            self.values.setdefault(label, []).append(value)
        if self.quiet:
            return
        elapsed = time.monotonic() - self.start
        left = elapsed / self.finished * (self.total - self.finished)
        if self.live:
            self._draw()
        else:
            shown = f"{self.metric}={value:.4f}" if value is not None else ""
            self.stream.write(
                f"[{self.finished}/{self.total}] {status.value:<8} {label} seed {seed} "
                f"{shown} ({_seconds(seconds)}; ~{_clock(left)} left)\n"
            )
            if self.verbose and error:
                self.stream.write(f"    {error}\n")
        self.stream.flush()

    def close(self) -> None:
        if self.live and not self.quiet and self.finished:
            self.stream.write("\n")
            self.stream.flush()

    def _best(self):
        if not self.values:
            return None
        means = {k: statistics.fmean(v) for k, v in self.values.items()}
        pick = max if Goal(self.goal) is Goal.MAX else min
        label = pick(means, key=means.get)
        return label, means[label]
