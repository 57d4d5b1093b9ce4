"""Helpers shared by the benchmark scripts: machine facts, timing, peak memory, results.

Every measured case runs in a fresh Python process (:func:`run_fresh`) so that its peak
resident memory is its own: the child reads ``VmHWM`` from ``/proc/self/status`` at the end
(:func:`peak_rss_bytes`). ``getrusage(RUSAGE_CHILDREN).ru_maxrss`` in the parent would be
the largest of *all* children so far, and on Linux a child's ``ru_maxrss`` can carry the
parent's peak across ``fork`` + ``exec``; ``VmHWM`` is reset by ``exec``.

Wall time is ``time.perf_counter``, CPU time ``time.process_time``. The machine is shared,
so :func:`machine` records the load average before and after a run: read wall-time figures
as "on this machine at that load"; CPU-time figures move much less with the load.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import statistics
import subprocess
import sys
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from retrograde.data import atomic_write_json

__all__ = [
    "RESULTS_DIR",
    "add_common_arguments",
    "cell",
    "current_rss_bytes",
    "format_table",
    "machine",
    "median_seconds",
    "peak_rss_bytes",
    "run_fresh",
    "serve_case",
    "timed",
    "write_results",
]

RESULTS_DIR = Path(__file__).resolve().parent / "results"
REPO_ROOT = Path(__file__).resolve().parent.parent
MIB = 2**20
#: environment variables that change numeric speed; recorded as they are, never set here
SPEED_VARIABLES = (
    "OPENBLAS_CORETYPE",
    "OPENBLAS_L2_SIZE",
    "OPENBLAS_NUM_THREADS",
    "OMP_NUM_THREADS",
    "MKL_NUM_THREADS",
)


def _status_kib(field: str) -> int | None:
    status = Path("/proc/self/status")
    if status.is_file():
        for line in status.read_text().splitlines():
            if line.startswith(field + ":"):
                return int(line.split()[1])  # the file reports kB (KiB)
    return None


def current_rss_bytes() -> int:
    """Resident memory of this process now, in bytes (``VmRSS``; 0 when unknown)."""
    return (_status_kib("VmRSS") or 0) * 1024


def peak_rss_bytes() -> int:
    """Peak resident memory of this process so far, in bytes (``VmHWM``; Linux).

    Falls back to ``getrusage(RUSAGE_SELF).ru_maxrss`` (KiB on Linux) elsewhere.
    """
    peak_kib = _status_kib("VmHWM")
    if peak_kib is None:
        peak_kib = int(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)
    return peak_kib * 1024


def timed(function: Callable[[], Any]) -> tuple[Any, float, float]:
    """``(result, wall seconds, CPU seconds of this process)`` of one call.

    CPU time (``time.process_time``, all threads) is reported beside wall time because
    the machine is shared: other work stretches wall time far more than CPU time.
    """
    wall, cpu = time.perf_counter(), time.process_time()
    result = function()
    return result, time.perf_counter() - wall, time.process_time() - cpu


def median_seconds(function: Callable[[], Any], repeats: int) -> tuple[Any, float, float]:
    """``(last result, median wall seconds, median CPU seconds)`` over ``repeats`` calls."""
    walls, cpus = [], []
    result = None
    for _ in range(repeats):
        result, wall, cpu = timed(function)
        walls.append(wall)
        cpus.append(cpu)
    return result, statistics.median(walls), statistics.median(cpus)


def _cpu_model() -> str:
    cpuinfo = Path("/proc/cpuinfo")
    if cpuinfo.is_file():
        for line in cpuinfo.read_text().splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    return platform.processor() or "unknown"


def _memory_gib() -> float | None:
    meminfo = Path("/proc/meminfo")
    if meminfo.is_file():
        for line in meminfo.read_text().splitlines():
            if line.startswith("MemTotal:"):
                return round(int(line.split()[1]) / 2**20, 1)
    return None


def _git_commit() -> str:
    result = subprocess.run(
        ["git", "describe", "--always", "--dirty", "--abbrev=12"],
        cwd=REPO_ROOT,
        capture_output=True,
        text=True,
        check=False,
    )
    return result.stdout.strip() or "unknown"


def machine() -> dict[str, Any]:
    """Facts a reader needs to compare figures: CPU, cores, memory, versions, load."""
    import numpy

    import retrograde

    return {
        "cpu": _cpu_model(),
        "logical_cpus": os.cpu_count(),
        "memory_gib": _memory_gib(),
        "platform": platform.platform(),
        "python": platform.python_version(),
        "numpy": numpy.__version__,
        "retrograde": retrograde.__version__,
        "retrograde_commit": _git_commit(),
        "speed_variables": {name: os.environ.get(name) for name in SPEED_VARIABLES},
        "load_average_1min": round(os.getloadavg()[0], 2),
        "date_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
    }


def run_fresh(script: Path, case: dict[str, Any], *, timeout: float = 900.0) -> dict[str, Any]:
    """Run one case as ``python SCRIPT --case JSON`` in a new process; return its JSON result.

    The child prints its result as the last line of stdout (see :func:`serve_case`).
    """
    argv = [sys.executable, str(script), "--case", json.dumps(case, sort_keys=True)]
    result = subprocess.run(argv, capture_output=True, text=True, check=False, timeout=timeout)
    lines = result.stdout.strip().splitlines()
    if result.returncode != 0 or not lines:
        tail = "\n".join(result.stderr.strip().splitlines()[-15:])
        raise RuntimeError(f"case {case} failed (exit {result.returncode}):\n{tail}")
    return dict(json.loads(lines[-1]))


def serve_case(case_json: str, measure: Callable[[dict[str, Any]], dict[str, Any]]) -> int:
    """Child side of :func:`run_fresh`: measure, add the peak memory, print one JSON line."""
    result = measure(json.loads(case_json))
    result["peak_rss_mib"] = round(peak_rss_bytes() / MIB, 1)
    print(json.dumps(result, sort_keys=True))
    return 0


def add_common_arguments(parser: argparse.ArgumentParser, name: str) -> None:
    """``--quick`` (tiny sizes, for the smoke test), ``--out`` and the hidden ``--case``."""
    parser.add_argument(
        "--quick", action="store_true", help="tiny sizes (seconds): checks the script runs"
    )
    parser.add_argument(
        "--out",
        type=Path,
        default=RESULTS_DIR / f"{name}.json",
        help=f"results file (default: benchmarks/results/{name}.json)",
    )
    parser.add_argument("--case", help=argparse.SUPPRESS)


def write_results(path: Path, payload: dict[str, Any]) -> None:
    """Write ``payload`` (sorted keys, 2-space indent) atomically and say where."""
    atomic_write_json(path, payload)
    print(f"\nresults written to {path}")


def cell(value: Any, spec: str) -> str:
    """``value`` formatted with ``spec``; ``-`` for None."""
    if value is None:
        return "-"
    if isinstance(value, bool):
        return "yes" if value else "NO"
    return format(value, spec) if spec else str(value)


def format_table(rows: Sequence[dict[str, Any]], columns: Sequence[tuple[str, str, str]]) -> str:
    """A plain-text table; ``columns`` are ``(key, header, format spec)``.

    >>> print(format_table([{"n": 3, "x": 0.5}], [("n", "n", "d"), ("x", "speed", ".2f")]))
    n  speed
    -  -----
    3   0.50
    """
    header = [title for _, title, _ in columns]
    body = [[cell(row.get(key), spec) for key, _, spec in columns] for row in rows]
    widths = [max(len(text) for text in column) for column in zip(header, *body, strict=True)]

    def line(cells: Sequence[str], first_left: bool = True) -> str:
        parts = [
            cell.ljust(width) if i == 0 and first_left else cell.rjust(width)
            for i, (cell, width) in enumerate(zip(cells, widths, strict=True))
        ]
        return "  ".join(parts).rstrip()

    separator = ["-" * width for width in widths]
    return "\n".join([line(header), line(separator), *(line(cells) for cells in body)])
