"""The host repository: the workflows behind the commands, on a team's own git + DVC repo.

retrograde lives inside a *host* repository. This layer locates it and runs ``git`` and
``dvc`` (always as argument lists, never through a shell), and holds what each command
does, as functions the command line only calls:

- :func:`find_host`, :class:`HostRepo`, :func:`run_git`, :func:`run_dvc` — the repository;
- :func:`install`, :func:`planned_files`, :func:`resolve_sources` — ``retrograde init``;
- :func:`run_pipeline` — ``retrograde run``: compose, write, ``dvc repro``, tidy the lock;
  :class:`ClusterOptions` — its ``--cluster`` (fit stages as Dask tasks);
- :func:`check_host`, :func:`check_file` — ``retrograde check``;
- :func:`plan_shard`, :func:`reproduce_shard` — ``retrograde plan``;
- :func:`rank_orders` — ``retrograde rank``: screen a space of orders, confirm the top k;
- :func:`read_table_at` — the gap table at a git revision (``compare``, ``table``);
- :func:`prepare_demo` — the throwaway demo host.

Everything written in a host lies under ``conf/retrograde/`` and ``pipelines/retrograde/``
(DESIGN.md, invariant 7).
"""

from __future__ import annotations

from ._check import (
    VOCABULARY_SHOWN,
    cell_status,
    check_host,
    format_host_check,
    round_trip_orders,
    vocabulary_listing,
)
from ._cluster import CLUSTER_MODES, ClusterOptions, parse_cluster
from ._corpus_paths import check_source_files, host_stage_outputs, resolve_sources
from ._demo import MARKER, commit_demo_results, next_steps, prepare_demo
from ._driver import (
    RunResult,
    compose_for,
    initialize,
    parse_repro_line,
    run_pipeline,
    stage_environment,
    write_pipeline_files,
)
from ._file_check import check_file, format_file_check, parse_order_spec, read_text
from ._lock import pipeline_lock, release_dead_dvc_locks
from ._lockfile import normalize_lock_order, order_lock_entries, ordered_keys, stage_order
from ._parallel import (
    StageRun,
    batch_pattern,
    batches,
    log_path_for,
    repro_argv,
    run_stage_batches,
    run_stages_in_parallel,
    stage_log,
    stale_stages,
)
from ._plan import Shard, parse_shard, plan_shard, reproduce_shard, shard_of
from ._rank import RANK_DIR, SCREEN_DIR, RankResult, plan_rank, rank_orders
from ._repo import (
    HostRepo,
    dvc_argv,
    failure_message,
    find_host,
    git_toplevel,
    last_error_line,
    require_installed,
    run_dvc,
    run_git,
    run_tool,
)
from ._revisions import read_table_at
from ._scaffold import (
    DVCIGNORE,
    DVCIGNORE_RULES,
    GITIGNORE,
    IGNORE_RULES,
    SOURCE_CONFIG,
    InstallResult,
    install,
    planned_files,
    source_config,
)
from ._screening import SCREEN_CACHE_VERSION, ScreenRound, proxy_bits, screen, training_subset
from ._stagefile import UNITS_BEGIN, UNITS_END, render_dvc_yaml

__all__ = [
    "CLUSTER_MODES",
    "DVCIGNORE",
    "DVCIGNORE_RULES",
    "GITIGNORE",
    "IGNORE_RULES",
    "MARKER",
    "RANK_DIR",
    "SCREEN_CACHE_VERSION",
    "SCREEN_DIR",
    "SOURCE_CONFIG",
    "UNITS_BEGIN",
    "UNITS_END",
    "ClusterOptions",
    "HostRepo",
    "InstallResult",
    "RankResult",
    "ScreenRound",
    "RunResult",
    "Shard",
    "StageRun",
    "batch_pattern",
    "batches",
    "cell_status",
    "check_source_files",
    "check_file",
    "VOCABULARY_SHOWN",
    "check_host",
    "commit_demo_results",
    "compose_for",
    "dvc_argv",
    "failure_message",
    "find_host",
    "format_file_check",
    "format_host_check",
    "vocabulary_listing",
    "git_toplevel",
    "host_stage_outputs",
    "initialize",
    "install",
    "last_error_line",
    "log_path_for",
    "next_steps",
    "normalize_lock_order",
    "order_lock_entries",
    "ordered_keys",
    "stage_order",
    "parse_cluster",
    "parse_order_spec",
    "parse_repro_line",
    "parse_shard",
    "pipeline_lock",
    "plan_rank",
    "plan_shard",
    "planned_files",
    "prepare_demo",
    "proxy_bits",
    "rank_orders",
    "read_table_at",
    "read_text",
    "release_dead_dvc_locks",
    "render_dvc_yaml",
    "repro_argv",
    "reproduce_shard",
    "require_installed",
    "resolve_sources",
    "round_trip_orders",
    "run_dvc",
    "run_git",
    "run_pipeline",
    "run_stage_batches",
    "run_stages_in_parallel",
    "run_tool",
    "screen",
    "shard_of",
    "source_config",
    "stage_log",
    "stage_environment",
    "stale_stages",
    "training_subset",
    "write_pipeline_files",
]
