"""Stage ``units``: cut one source into train/valid/test units in the natural order.

``python -m retrograde.stages.units --source NAME`` (wdir: the pipeline folder) reads
``study.sources.NAME`` from ``params.yaml`` and writes ``data/NAME/units/``: the three
split folders, ``info.json``, and ``tokenizer.json`` (file sources) or ``floors.npy``
(calibration sources: exact nats per test unit, end marker included).

File sources go through :func:`retrograde.units.prepare_units` (hash split of each unit's
natural content, vocabulary fitted on train only). Calibration sources generate
``calibration.n_units`` units once and split them with the same salted hash, so identical
units always share a split (DESIGN.md invariant 1).
"""

from __future__ import annotations

import argparse
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from .._io import atomic_dir, atomic_write_json
from .._plugin_checks import covered, working_directory
from ..errors import DataError
from ..sequences import SequenceSet
from . import read_params, run_stage, units_dir

__all__ = ["SPLITS", "calibration_units", "main"]

SPLITS = ("train", "valid", "test")


def calibration_units(
    source: Any, *, n_units: int, seed: int, fractions: Sequence[float], salt: str
) -> tuple[dict[str, SequenceSet], np.ndarray]:
    """Generate units, split them by salted content hash; return splits and test floors.

    Returns ``({split: SequenceSet}, floors)`` with ``floors`` (n_test_units,) float64 nats.
    """
    from ..units import assign_splits

    units = source.generate(n_units, seed)
    # One key per unit (a loop over units, not tokens): its little-endian int32 bytes.
    keys = [units[i].astype("<i4").tobytes() for i in range(len(units))]
    split_of_unit = np.asarray(assign_splits(keys, tuple(fractions), salt))
    splits = {name: units.subset(split_of_unit == k) for k, name in enumerate(SPLITS)}
    return splits, np.asarray(source.nll(splits["test"]), dtype=np.float64)


def _check_splits(source_name: str, splits: dict[str, SequenceSet]) -> None:
    for name in ("train", "test"):
        if len(splits[name]) == 0:
            raise DataError(
                f"source {source_name!r}: the {name} split is empty; add data or raise its "
                f"fraction in study.sources.{source_name}.split.fractions"
            )


def _write(folder: Path, splits: dict[str, SequenceSet], info: dict[str, Any], extra: Any) -> None:
    with atomic_dir(folder) as tmp:
        for name, units in splits.items():
            units.save(tmp / name)
        atomic_write_json(tmp / "info.json", info)
        extra(tmp)


def _body(args: argparse.Namespace) -> None:
    from .. import sources

    wdir = Path(args.params).resolve()
    spec = read_params(wdir)["study"]["sources"][args.source]
    root = (wdir / args.root).resolve()
    out = wdir / str(units_dir(args.source))
    info: dict[str, Any] = {"source": args.source, "kind": spec["kind"], "name": spec["name"]}
    # Sources resolve their file paths from the working folder: the host root.
    with working_directory(root):
        source = sources.make(spec["name"], **spec["params"])
        if spec["kind"] == "calibration":
            calibration = spec["calibration"]
            splits, floors = calibration_units(
                source,
                n_units=calibration["n_units"],
                seed=calibration["seed"],
                fractions=spec["split"]["fractions"],
                salt=spec["split"]["salt"],
            )
            info.update(
                vocab_size=int(source.vocab_size),  # type: ignore[attr-defined]
                spans=source.spans(source.unit_length),  # type: ignore[attr-defined]
                metadata=source.metadata(),  # type: ignore[attr-defined]
            )

            def extra(tmp: Path) -> None:
                np.save(tmp / "floors.npy", floors)
        else:
            splits, prepared = _file_units(args.source, source, spec)
            info.update(vocab_size=int(splits["train"].vocab_size or 0), spans={})
            info["summary"] = prepared.summary()

            def extra(tmp: Path) -> None:
                if prepared.tokenizer is not None:
                    prepared.tokenizer.save(tmp / "tokenizer.json")

    _check_splits(args.source, splits)
    info["n_units"] = {name: len(units) for name, units in splits.items()}
    info["n_tokens"] = {name: int(len(units.tokens)) for name, units in splits.items()}
    _write(out, splits, info, extra)


def _file_units(name: str, source: Any, spec: dict[str, Any]) -> tuple[dict[str, SequenceSet], Any]:
    from .. import tokenize
    from ..units import prepare_units

    root = Path.cwd()  # the host root (see _body)
    for path in source.paths():
        # A file DVC does not track would not trigger a rerun when it changes.
        resolved = Path(path).resolve()
        inside = resolved.is_relative_to(root)
        if not inside or not covered(resolved.relative_to(root).as_posix(), spec["deps"]):
            raise DataError(
                f"source {name!r} reads {path} but study.sources.{name}.deps does not list "
                "it; add it and run `retrograde run` again"
            )
    tokenizer_spec = spec["tokenizer"]
    tokenizer = (
        None
        if tokenizer_spec is None
        else tokenize.make(tokenizer_spec["name"], **tokenizer_spec["params"])
    )
    units_spec, split = spec["units"], spec["split"]
    # Optional for plug-in sources that only implement paths() and documents().
    declared = getattr(source, "declared_vocab_size", None)
    prepared = prepare_units(
        source.documents(),
        tokenizer=tokenizer,
        mode=units_spec["mode"],
        window=units_spec["window"],
        fractions=tuple(split["fractions"]),
        salt=split["salt"],
        remainder=units_spec["remainder"],
        vocab_size=declared() if callable(declared) else None,
    )
    return dict(prepared.splits), prepared


def _configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--source", required=True, help="a key of study.sources")
    parser.add_argument("--root", default="../..", help="host root, relative to --params")


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point: ``python -m retrograde.stages.units --source NAME``."""
    return run_stage("units", _configure, _body, argv)


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
