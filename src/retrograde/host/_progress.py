"""What a run tells its user while it works: counts, times, an estimate of the time left.

Stages are reported as they start and finish: every finished stage of the pipeline gets a
line with its time and the counters (``done / total``, running, left, elapsed, about how
long is left); on a terminal a status line under them is kept current, and in a log (CI)
a plain line about what is still running comes at least every :data:`HEARTBEAT` seconds,
so a long fit never means a long silence. The host's own stages upstream of the corpus are
reported too, outside the counters (they are not retrograde's).

Each stage's final state is counted once (a fit run in parallel and then seen unchanged by
the closing ``dvc repro`` is a stage that ran), so the totals add up.
"""

from __future__ import annotations

import sys
import threading
import time
from collections.abc import Callable
from typing import TextIO

__all__ = ["HEARTBEAT", "Progress", "duration"]

#: most seconds between two lines while stages run without a terminal
HEARTBEAT = 60.0
_PRECEDENCE = {"unchanged": 0, "restored": 1, "ran": 2, "failed": 3}


def duration(seconds: float) -> str:
    """``42 s``, ``3m05s``, ``2h04m``.

    >>> duration(4.24), duration(185), duration(7440)
    ('4.2 s', '3m05s', '2h04m')
    """
    if seconds < 60:
        return f"{seconds:.1f} s"
    minutes, secs = divmod(int(round(seconds)), 60)
    if minutes < 60:
        return f"{minutes}m{secs:02d}s"
    hours, minutes = divmod(minutes, 60)
    return f"{hours}h{minutes:02d}m"


class Progress:
    """Counters and lines for one run; thread-safe (parallel stages report from threads).

    Parameters
    ----------
    total : int
        Stages of the pipeline this run may act on (its own, not the host's).
    stream : text stream
        Where lines go (stderr).
    live : bool or None
        Keep a status line current (a terminal); ``None``: when ``stream`` is a terminal.
    clock : callable
        Seconds, monotonic (tests pass their own).
    """

    def __init__(
        self,
        total: int,
        *,
        stream: TextIO | None = None,
        live: bool | None = None,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.total = total
        self.host_stages: set[str] = set()
        self.stream = stream if stream is not None else sys.stderr
        self.live = self.stream.isatty() if live is None else live
        self.clock = clock
        self.start = clock()
        self.running: dict[str, float] = {}
        self.state: dict[str, str] = {}
        #: cells each cluster worker finished (ran or restored), by worker name
        self.by_worker: dict[str, int] = {}
        self._lock = threading.Lock()
        self._last_line = self.start
        self._stop = threading.Event()
        self._ticker: threading.Thread | None = None

    # ------------------------------------------------------------------ reports
    def ours(self, stage: str) -> bool:
        return stage not in self.host_stages

    def started(self, stage: str, *, host: bool = False) -> None:
        """``stage`` began; ``host``: a stage of the host's own pipeline (not counted)."""
        with self._lock:
            if host:
                self.host_stages.add(stage)
            self.running[stage] = self.clock()
            if not self.ours(stage):
                self._print(f"  host stage {stage}: running")
            self._status()

    def finished(
        self, stage: str, event: str, *, host: bool = False, worker: str | None = None
    ) -> None:
        """``event`` is ``ran``, ``restored``, ``unchanged`` or ``failed``; ``worker``: the
        cluster worker it ran on (its line then says so, with that worker's count)."""
        with self._lock:
            if host:
                self.host_stages.add(stage)
            where = ""
            if worker is not None and event != "failed":
                self.by_worker[worker] = self.by_worker.get(worker, 0) + 1
                where = f" on {worker} ({self.by_worker[worker]} there)"
            elif worker is not None:
                where = f" on {worker}"
            began = self.running.pop(stage, None)
            previous = self.state.get(stage)
            if previous is None or _PRECEDENCE[event] > _PRECEDENCE[previous]:
                self.state[stage] = event
            if event == "unchanged" or (previous is not None and event != "failed"):
                self._status()
                return  # counted, not announced: nothing happened to it now
            took = "" if began is None else f" in {duration(self.clock() - began)}"
            if not self.ours(stage):
                self._print(f"  host stage {stage}: {event}{took}")
            else:
                done = f"[{self._done():>{len(str(self.total))}}/{self.total}]"
                self._print(f"  {done} {event:<8} {stage}{took}{where}  ({self._counters()})")
            self._status()

    def counts(self) -> dict[str, list[str]]:
        """Our stages by final state (each counted once), for the run's summary."""
        with self._lock:
            out: dict[str, list[str]] = {"ran": [], "restored": [], "unchanged": [], "failed": []}
            for stage, event in self.state.items():
                if self.ours(stage):
                    out[event].append(stage)
            return out

    # ---------------------------------------------------------------- heartbeat
    def __enter__(self) -> Progress:
        self._ticker = threading.Thread(target=self._tick, daemon=True)
        self._ticker.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        if self._ticker is not None:
            self._ticker.join()
        if self.live:
            with self._lock:
                self.stream.write("\r\033[K")
                self.stream.flush()

    def _tick(self) -> None:
        interval = 1.0 if self.live else HEARTBEAT
        while not self._stop.wait(interval):
            with self._lock:
                if self.live:
                    self._status()
                elif self.running and self.clock() - self._last_line >= HEARTBEAT:
                    self._print(f"  still running: {self._running_text()}  ({self._counters()})")

    # ------------------------------------------------------------------ helpers
    def _done(self) -> int:
        return sum(1 for stage in self.state if self.ours(stage))

    def _counters(self) -> str:
        done = self._done()
        running = sum(1 for stage in self.running if self.ours(stage))
        left = max(self.total - done - running, 0)
        elapsed = self.clock() - self.start
        text = f"{running} running, {left} left, {duration(elapsed)} elapsed"
        acted = [s for s, e in self.state.items() if self.ours(s) and e in ("ran", "restored")]
        if acted and (left or running):
            # Finished work so far predicts the rest, parallelism included.
            estimate = elapsed / len(acted) * (left + running)
            text += f", about {duration(estimate)} left"
        return text

    def _running_text(self) -> str:
        now = self.clock()
        return ", ".join(f"{s} ({duration(now - t)})" for s, t in self.running.items())

    def _print(self, line: str) -> None:
        if self.live:
            self.stream.write("\r\033[K")
        print(line, file=self.stream, flush=True)
        self._last_line = self.clock()

    def _status(self) -> None:
        if not self.live:
            return
        line = f"  {self._done()}/{self.total} done; {self._counters()}"
        if self.by_worker:
            line += " | by worker: " + ", ".join(f"{w} {n}" for w, n in self.by_worker.items())
        if self.running:
            line += f" | {self._running_text()}"
        self.stream.write("\r\033[K" + line[:200])
        self.stream.flush()
