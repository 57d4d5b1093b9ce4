"""What a run prints while it works: counters that add up, times, and lines without a terminal."""

from __future__ import annotations

import io

from retrograde.host import parse_repro_line
from retrograde.host._progress import Progress, duration


class Clock:
    def __init__(self) -> None:
        self.now = 0.0

    def __call__(self) -> float:
        return self.now


def _progress(total: int) -> tuple[Progress, io.StringIO, Clock]:
    stream, clock = io.StringIO(), Clock()
    return Progress(total, stream=stream, live=False, clock=clock), stream, clock


def test_each_finished_stage_gets_a_line_with_its_time_and_counters_that_add_up():
    progress, stream, clock = _progress(4)
    progress.started("fit@a")
    progress.started("fit@b")
    clock.now = 10
    progress.finished("fit@a", "ran")
    progress.finished("units_x", "unchanged")  # counted, not announced
    clock.now = 30
    progress.finished("fit@b", "restored")
    progress.finished("table", "ran")
    lines = stream.getvalue().splitlines()
    assert lines[0] == (
        "  [1/4] ran      fit@a in 10.0 s  (1 running, 2 left, 10.0 s elapsed, about 30.0 s left)"
    )
    assert lines[1].startswith("  [3/4] restored fit@b in 30.0 s  (0 running, 1 left")
    assert lines[2].startswith("  [4/4] ran      table  (0 running, 0 left, 30.0 s elapsed)")
    assert progress.counts() == {
        "ran": ["fit@a", "table"],
        "restored": ["fit@b"],
        "unchanged": ["units_x"],
        "failed": [],
    }


def test_a_stage_seen_twice_counts_once_by_its_strongest_state():
    # A fit run in parallel, then seen unchanged by the closing `dvc repro`: it ran.
    progress, _, _ = _progress(2)
    progress.started("fit@a")
    progress.finished("fit@a", "ran")
    progress.finished("fit@a", "unchanged")
    progress.finished("table", "unchanged")
    assert progress.counts()["ran"] == ["fit@a"] and progress._done() == 2


def test_host_stages_are_reported_but_not_counted():
    progress, stream, clock = _progress(1)
    progress.started("prepare", host=True)
    clock.now = 3
    progress.finished("prepare", "ran", host=True)
    assert stream.getvalue().splitlines() == [
        "  host stage prepare: running",
        "  host stage prepare: ran in 3.0 s",
    ]
    assert progress.counts()["ran"] == []


def test_durations_read_like_a_clock():
    assert [duration(s) for s in (0.04, 59.94, 60, 3599, 3600)] == [
        "0.0 s",
        "59.9 s",
        "1m00s",
        "59m59s",
        "1h00m",
    ]


def test_dvc_lines_name_our_stages_apart_from_the_hosts():
    ours = parse_repro_line("Running stage 'pipelines/retrograde/dvc.yaml:table':")
    host = parse_repro_line("Running stage 'prepare':")
    assert (ours.stage, ours.ours) == ("table", True)
    assert (host.stage, host.ours) == ("prepare", False)


def test_a_cluster_cell_line_names_its_worker_and_how_many_that_worker_finished():
    progress, stream, clock = _progress(3)
    for stage in ("fit@a", "fit@b", "fit@c"):
        progress.started(stage)
    clock.now = 4
    progress.finished("fit@a", "ran", worker="worker 0")
    progress.finished("fit@b", "restored", worker="worker 0")
    progress.finished("fit@c", "failed", worker="worker 1")  # a failure is not a cell done there
    lines = stream.getvalue().splitlines()
    assert " fit@a in 4.0 s on worker 0 (1 there)  (" in lines[0]
    assert " fit@b in 4.0 s on worker 0 (2 there)  (" in lines[1]
    assert " fit@c in 4.0 s on worker 1  (" in lines[2]
    assert progress.by_worker == {"worker 0": 2}
