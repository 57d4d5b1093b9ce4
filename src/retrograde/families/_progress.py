"""Progress inside a fit: a tqdm bar on a terminal, plain lines in a cell's ``fit.log``.

A fit that runs for minutes inside a DVC stage has no terminal: its progress would be
lost. The fit stage points :func:`progress_log` at the cell's log, and every family's
:func:`progress_bar` then also writes a plain line there at each tenth of the work, so
``tail -f fit.log`` shows where a long epoch stands. The lines carry no clock time: the
log is part of the cell's DVC output, whose hash must not depend on how fast it ran
(the run's own status line gives the times).

>>> import io
>>> log = io.StringIO()
>>> with progress_log(log):
...     with progress_bar(total=4, desc="demo fit", unit="event", enabled=False) as bar:
...         bar.update(4)
>>> log.getvalue().splitlines()[-1].startswith("demo fit: 100% (4/4 event")
True
"""

from __future__ import annotations

import contextlib
from collections.abc import Iterator
from typing import Any, TextIO

from tqdm.auto import tqdm

__all__ = ["progress_bar", "progress_log"]

_LOG: list[TextIO] = []  # the sink a fit stage installed, if any (a stack of one)


@contextlib.contextmanager
def progress_log(stream: TextIO) -> Iterator[None]:
    """Also write every progress bar's steps, as plain lines, to ``stream`` in the body."""
    _LOG.append(stream)
    try:
        yield
    finally:
        _LOG.pop()


class _Bar:
    """A tqdm bar (shown only on a terminal, and when ``enabled``) plus plain log lines."""

    def __init__(self, total: int, desc: str, unit: str, enabled: bool) -> None:
        self.total, self.desc, self.unit = max(int(total), 0), desc, unit
        self.done = 0
        self.next_tenth = 1
        self.bar = tqdm(
            total=total, desc=desc, unit=unit, unit_scale=True, disable=None if enabled else True
        )

    def update(self, n: int = 1) -> None:
        self.bar.update(n)
        self.done += int(n)
        if not _LOG or self.total <= 0:
            return
        if self.next_tenth <= 10 and self.done * 10 >= self.next_tenth * self.total:
            # One line per update that crosses a tenth (a coarse update may cross several).
            self.next_tenth = self.done * 10 // self.total + 1
            print(
                f"{self.desc}: {min(self.done, self.total) * 100 // self.total}% "
                f"({self.done:,}/{self.total:,} {self.unit})",
                file=_LOG[-1],
                flush=True,
            )

    def set_postfix(self, **values: Any) -> None:
        self.bar.set_postfix(**values)

    def close(self) -> None:
        self.bar.close()

    def __enter__(self) -> _Bar:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def progress_bar(*, total: int, desc: str, unit: str, enabled: bool = True) -> _Bar:
    """A progress bar for ``total`` units of work (see the module docstring)."""
    return _Bar(total, desc, unit, enabled)
