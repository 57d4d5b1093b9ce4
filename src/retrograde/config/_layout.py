"""Where the experiment's pieces live in a host repository, and what the DVC stages are called.

Everything retrograde writes in a host lies under :data:`CONF_DIR` and :data:`PIPELINE_DIR`
(DESIGN.md, invariant 7). Inside the pipeline folder (the stages' working folder)::

    params.yaml                              composed by `retrograde run`
    data/<source>/units/{train,valid,test}/  SequenceSet folders, natural order
    data/<source>/units/info.json            vocabulary, tokenizer, spans, metadata
    data/<source>/units/tokenizer.json       file sources only
    data/<source>/units/floors.npy           calibration sources: exact nats per test unit
    data/<source>/orders/<order>/{train,valid,test}/ + positions_test.npy
    cells/<source>/<model>/<order>/seed<seed>/{model/,test_logprobs.npy,curve.json,fit.log}
    metrics.json  report.md  plots/  logs/
"""

from __future__ import annotations

from pathlib import PurePosixPath

__all__ = [
    "CONF_DIR",
    "DVC_FILE",
    "LOCK_FILE",
    "LOG_DIR",
    "METRICS_FILE",
    "PARAMS_FILE",
    "PIPELINE_DIR",
    "WDIR_TO_ROOT",
    "cell_dir",
    "fit_stage_name",
    "order_dir",
    "reorder_stage_name",
    "units_dir",
    "units_stage_name",
]

#: Host config folder (Hydra config groups), relative to the host root.
CONF_DIR = PurePosixPath("conf/retrograde")
#: DVC working folder of the pipeline, relative to the host root.
PIPELINE_DIR = PurePosixPath("pipelines/retrograde")
#: The pipeline's stage, lock, params and metrics files, relative to the host root.
DVC_FILE = PIPELINE_DIR / "dvc.yaml"
LOCK_FILE = PIPELINE_DIR / "dvc.lock"
PARAMS_FILE = PIPELINE_DIR / "params.yaml"
METRICS_FILE = PIPELINE_DIR / "metrics.json"
#: Per-stage logs, relative to the host root (git-ignored by ``init``).
LOG_DIR = PIPELINE_DIR / "logs"
#: the host root seen from the pipeline folder
WDIR_TO_ROOT = "../.."


def units_dir(source: str) -> PurePosixPath:
    return PurePosixPath("data", source, "units")


def order_dir(source: str, order: str) -> PurePosixPath:
    return PurePosixPath("data", source, "orders", order)


def cell_dir(source: str, model: str, order: str, seed: int) -> PurePosixPath:
    return PurePosixPath("cells", source, model, order, f"seed{seed}")


def units_stage_name(source: str) -> str:
    """DVC refuses ``@`` in a plain stage name, so generated units stages use ``_``."""
    return f"units_{source}"


def reorder_stage_name(source: str, order: str) -> str:
    return f"reorder@{source}-{order}"


def fit_stage_name(source: str, model: str, order: str, seed: int) -> str:
    """The name DVC gives a fit stage: ``fit@`` and the key of its ``fits`` entry."""
    return f"fit@{source}-{model}-{order}-{seed}"
