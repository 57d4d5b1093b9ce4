"""Running an external trainer for the ``command`` family and checking what it wrote.

The protocol is described in :mod:`retrograde.families.command`.
"""

from __future__ import annotations

import contextlib
import json
import os
import re
import signal
import subprocess
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from ..data import SequenceSet
from ..errors import FitError
from ..validation import invalid
from ._probe import PROBE_FILE, PROBE_OUTPUT, check_probe

__all__ = ["check_arguments", "read_curve", "run_in_own_group", "run_trainer"]

_PLACEHOLDER = re.compile(r"\{(\w+)\}")
_STDERR_TAIL = 800  # characters of stderr quoted in an error
_DRAIN_SECONDS = 10.0  # how long a killed trainer's output is still read


def check_arguments(owner: str, key: str, arguments: Any, allowed: Sequence[str]) -> None:
    names = ", ".join("{" + name + "}" for name in allowed)
    if (
        not isinstance(arguments, list)
        or not arguments
        or not all(isinstance(a, str) for a in arguments)
    ):
        raise invalid(owner, key, arguments, f"a non-empty list of strings using {names}")
    for argument in arguments:
        for name in _PLACEHOLDER.findall(argument):
            if name not in allowed:
                raise invalid(owner, key, arguments, f"placeholders {names} (found {{{name}}})")


def _substitute(arguments: Sequence[str], places: dict[str, str]) -> list[str]:
    def one(argument: str) -> str:
        return _PLACEHOLDER.sub(lambda m: places.get(m.group(1), m.group(0)), argument)

    return [one(a) for a in arguments]


def run_in_own_group(argv: Sequence[str], timeout: float) -> subprocess.CompletedProcess[bytes]:
    """Run ``argv`` (no shell) in a new process group; kill the whole group when done.

    The trainer is the leader of its own session, so its children (data loaders, a shell
    script's commands, a ``torchrun``) share its process group. On a timeout, an interrupt
    or any other exit from here, ``SIGKILL`` goes to the group, so nothing the trainer
    started outlives it; after a normal exit, stragglers of the group are killed too.
    Raises :class:`subprocess.TimeoutExpired` (with the stderr read so far) on a timeout.
    """
    with subprocess.Popen(
        list(argv),
        stdin=subprocess.DEVNULL,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        start_new_session=True,
    ) as process:
        try:
            stdout, stderr = process.communicate(timeout=timeout)
        except subprocess.TimeoutExpired:
            _kill_group(process.pid)
            # The pipes close once every process of the group is gone; a process that left
            # the group (setsid) may hold them open, so the read is bounded.
            try:
                stdout, stderr = process.communicate(timeout=_DRAIN_SECONDS)
            except subprocess.TimeoutExpired:
                stdout, stderr = b"", b""
            raise subprocess.TimeoutExpired(argv, timeout, stdout, stderr) from None
        finally:
            _kill_group(process.pid)
        return subprocess.CompletedProcess(list(argv), process.returncode, stdout, stderr)


def _kill_group(group: int) -> None:
    with contextlib.suppress(ProcessLookupError, PermissionError):
        os.killpg(group, signal.SIGKILL)


def run_trainer(
    arguments: Sequence[str],
    places: dict[str, str],
    out: Path,
    test: SequenceSet,
    timeout: float,
    key: str,
    probe: np.ndarray,
) -> tuple[np.ndarray, np.ndarray]:
    """Run the trainer (no shell); read and check ``out/logprobs.npy`` and the probe.

    ``probe`` holds the ``(unit, position)`` pairs written to ``{test}/probe.npy``. Returns
    the flat log-probabilities and the probe's ``(k, vocab_size + 1)`` distributions.
    """
    argv = _substitute(arguments, places)
    shown = " ".join(arguments)
    try:
        done = run_in_own_group(argv, timeout)
    except FileNotFoundError as exc:
        raise FitError(
            f"family 'command': {key} program {argv[0]!r} was not found; give an existing "
            "program (an absolute path, or one on PATH)"
        ) from exc
    except subprocess.TimeoutExpired as exc:
        raise FitError(
            f"family 'command': {key} [{shown}] did not finish within {timeout:g} s (it and "
            "every process it started were killed); raise the family's timeout or speed up "
            f"the trainer; stderr tail: {_tail(exc.stderr)}"
        ) from exc
    tail = _tail(done.stderr)
    if done.returncode != 0:
        raise FitError(
            f"family 'command': {key} [{shown}] exited with status {done.returncode}; "
            f"stderr tail: {tail}"
        )
    path = out / "logprobs.npy"
    if not path.is_file():
        raise FitError(
            f"family 'command': {key} [{shown}] wrote no {{out}}/logprobs.npy; write float64 "
            f"log-probabilities there; stderr tail: {tail}"
        )
    try:
        values = np.load(path, allow_pickle=False)
    except ValueError as exc:
        raise FitError(f"family 'command': {path.name} is not a plain .npy array ({exc})") from exc
    expected = len(test.tokens) + len(test)
    if values.ndim != 1 or values.shape[0] != expected or values.dtype.kind not in "fi":
        raise FitError(
            f"family 'command': {key} wrote {path.name} with shape {values.shape} and dtype "
            f"{values.dtype}; expected float64 ({expected},): len + 1 per test unit "
            f"({len(test)} units, {len(test.tokens)} tokens); stderr tail: {tail}"
        )
    values = values.astype(np.float64)
    bad = np.flatnonzero(~np.isfinite(values) | (values > 0))
    if len(bad):
        raise FitError(
            f"family 'command': {key} wrote {len(bad)} log-probabilities that are not finite "
            f"and <= 0 (first at flat index {bad[0]}: {float(values[bad[0]])!r}); every outcome needs "
            f"a probability in (0, 1]; stderr tail: {tail}"
        )
    return values, _read_probe(out, test, values, probe, f"family 'command': {key} output")


def _read_probe(
    out: Path, test: SequenceSet, values: np.ndarray, probe: np.ndarray, owner: str
) -> np.ndarray:
    """The trainer's ``{out}/probe_logprobs.npy``, checked (see ``_probe.check_probe``)."""
    path = out / PROBE_OUTPUT
    if not path.is_file():
        if len(probe) == 0:
            return np.zeros((0, test.effective_vocab_size() + 1))
        raise FitError(
            f"{owner} wrote no {{out}}/{PROBE_OUTPUT}; for each (unit, position) row of "
            f"{{test}}/{PROBE_FILE} write the full distribution (vocab_size + 1 natural logs: "
            "every token id, then the end marker) there; see docs/trainers.md"
        )
    try:
        distributions = np.load(path, allow_pickle=False)
    except ValueError as exc:
        raise FitError(f"{owner}: {PROBE_OUTPUT} is not a plain .npy array ({exc})") from exc
    check_probe(owner, test, values, probe, distributions)
    return np.asarray(distributions, dtype=np.float64)


def _tail(stderr: bytes | str | None) -> str:
    if not stderr:
        return "(empty)"
    text = stderr.decode("utf-8", "replace") if isinstance(stderr, bytes) else stderr
    text = " | ".join(line for line in text.strip().splitlines() if line.strip())
    return text[-_STDERR_TAIL:]


def read_curve(path: Path) -> list[dict[str, float]]:
    if not path.is_file():
        return []
    try:
        curve = json.loads(path.read_text())
    except json.JSONDecodeError as exc:
        raise FitError(f"family 'command': {path.name} is not valid JSON ({exc})") from exc
    ok = isinstance(curve, list) and all(
        isinstance(r, dict) and "epoch" in r and "valid_bits_per_token" in r for r in curve
    )
    if not ok:
        raise FitError(
            f"family 'command': {path.name} must be a list of "
            '{"epoch": ..., "valid_bits_per_token": ...} records'
        )
    return [dict(r) for r in curve]
