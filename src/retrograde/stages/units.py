"""Stage ``units``: cut one source into train/valid/test units in the natural order.

``python -m retrograde.stages.units --source NAME`` (wdir: the pipeline folder) reads
``study.sources.NAME`` from ``params.yaml`` and writes ``data/NAME/units/``: the three
split folders, ``info.json``, and ``tokenizer.json`` (file sources) and ``floors.npy``
(calibration sources, and records that carry their exact NLL: exact nats per test unit,
end marker included). A source with per-unit spans (``records``) also writes
``<split>/span_ids.npy`` ((n_tokens,) int16, the span of every natural-order token, an
index into ``info.json``'s ``span_names``; -1 for none). The units come from
:func:`retrograde.sources.source_units`, as ``retrograde check`` makes them.
"""

from __future__ import annotations

if __name__ == "__main__":  # a command of a run: the run's stage server may run it (server.py)
    from retrograde.stages.server import delegate

    delegate("units")

import argparse
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from ..config import (
    SourceConfig,
    check_file_types,
    check_repo_path,
    covered,
    load_params,
    units_dir,
)
from ..data import (
    atomic_dir,
    atomic_write_json,
    read_unit_ids,
    tokenizers,
    working_directory,
)
from ..errors import DataError, PluginError, RetrogradeError
from . import run_stage

__all__ = ["SPAN_IDS_FILE", "configured_units", "main"]

#: the per-token span labels of a split, beside its tokens
SPAN_IDS_FILE = "span_ids.npy"


def configured_units(name: str, spec: SourceConfig, root: Path) -> Any:
    """The :class:`~retrograde.sources.SourceUnits` of ``study.sources.NAME`` (files from ``root``)."""
    from .. import sources

    with working_directory(root):  # sources resolve their file paths from the host root
        source = sources.make(spec.name, **spec.params)
        if isinstance(source, sources.FileSource):
            _check_deps(name, source, spec.deps or [], root)
        tokenizer = None
        if spec.tokenizer is not None:
            tokenizer = tokenizers.make(spec.tokenizer.name, **spec.tokenizer.params)
        units, calibration = spec.units, spec.calibration
        test_ids = None
        if spec.split.test_ids is not None:
            test_ids = read_unit_ids(root / spec.split.test_ids, spec.split.test_ids)
        try:
            made = sources.source_units(
                source,
                fractions=spec.split.fractions,
                salt=spec.split.salt,
                tokenizer=tokenizer,
                mode=None if units is None else units.mode,
                window=None if units is None else units.window,
                remainder="drop" if units is None else units.remainder,
                n_units=1000 if calibration is None else calibration.n_units,
                seed=0 if calibration is None else calibration.seed,
                test_ids=test_ids,
                max_units=spec.subsample.max_units,
                subsample_seed=spec.subsample.seed,
            )
        except RetrogradeError:
            raise
        except Exception as exc:
            if type(source).__module__.split(".")[0] == "retrograde":
                raise  # a bug of ours: keep the traceback
            raise PluginError(
                f"study.sources.{name}: source {spec.name!r} raised {type(exc).__name__} "
                f"while reading: {exc}; fix the source's code (--debug shows the traceback)"
            ) from exc
    for split in ("train", "test"):
        if len(made.splits[split]) == 0:
            raise DataError(
                f"source {name!r}: the {split} split is empty; add data or raise its "
                f"fraction in study.sources.{name}.split.fractions"
            )
    return made


def _check_deps(name: str, source: Any, deps: list[str], root: Path) -> None:
    """A file DVC does not track would not trigger a rerun when it changes: refuse it.

    The rules composition applies to the files a source reads apply again here, on the
    files as they are now: a name DVC or YAML would misread, a file of ``.git/`` or
    ``.dvc/``, anything but a regular file (a FIFO would block the stage).
    """
    where = f"study.sources.{name}"
    for path in source.paths():
        resolved = Path(path).resolve()
        inside = resolved.is_relative_to(root)
        if not inside or not covered(resolved.relative_to(root).as_posix(), deps):
            raise DataError(
                f"source {name!r} reads {path} but study.sources.{name}.deps does not list "
                "it; add it and run `retrograde run` again"
            )
        relative = resolved.relative_to(root).as_posix()
        check_repo_path(where, relative)
        check_file_types(where, resolved, relative)


def _body(args: argparse.Namespace) -> None:
    wdir = Path(args.params).resolve()
    spec = load_params(wdir).study.sources[args.source]
    made = configured_units(args.source, spec, (wdir / args.root).resolve())
    from .. import sources

    calibration = getattr(sources.registry.get(spec.name), "is_calibration", False)
    kind = "calibration" if calibration else "file"
    info: dict[str, Any] = {"source": args.source, "kind": kind, "name": spec.name, **made.info}
    info["n_units"] = {name: len(units) for name, units in made.splits.items()}
    info["n_tokens"] = {name: int(len(units.tokens)) for name, units in made.splits.items()}
    with atomic_dir(wdir / str(units_dir(args.source))) as tmp:
        for split, units in made.splits.items():
            units.save(tmp / split)
            if made.span_ids is not None:  # per-token span labels beside the tokens
                np.save(tmp / split / SPAN_IDS_FILE, made.span_ids[split])
        atomic_write_json(tmp / "info.json", info)
        if made.floors is not None:
            np.save(tmp / "floors.npy", made.floors)
        if made.tokenizer is not None:
            made.tokenizer.save(tmp / "tokenizer.json")


def _configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--source", required=True, help="a key of study.sources")
    parser.add_argument("--root", default="../..", help="host root, relative to --params")


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point: ``python -m retrograde.stages.units --source NAME``."""
    return run_stage("units", _configure, _body, argv)


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
