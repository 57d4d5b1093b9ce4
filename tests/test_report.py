"""metrics.json, report.md and the table formats."""

from __future__ import annotations

import csv
import io
import json
import subprocess
import sys

import numpy as np
import pytest

from retrograde import Ragged
from retrograde.errors import ConfigError
from retrograde.report import CAUTIONS, format_table, is_reference_leaf, write_all
from retrograde.stats import (
    adjust_holm,
    position_profile,
    seed_warning,
    simultaneous_intervals,
    span_breakdown,
    summarize_model,
)

ORDERS = ("forward", "reverse", "block_reverse")


def build_run(n_seeds: int = 3, seed: int = 0) -> dict:
    """The inputs a table stage passes to write_all, built from simulated losses."""
    rng = np.random.default_rng(seed)
    table, profiles, spans, curves, draws = {}, {}, {}, {}, {}
    for source in ("demo", "markov"):
        table[source], profiles[source], curves[source] = {}, {}, {}
        for model, factor in (("ngram_n2", 1.05), ("ngram_n3", 1.02)):
            base = rng.gamma(4.0, 10.0, size=(n_seeds, 60))
            losses = {
                "forward": base,
                "reverse": base * factor + rng.normal(0.0, 1.0, size=base.shape),
                "block_reverse": base + rng.normal(0.0, 1.0, size=base.shape),
            }
            draws.setdefault(source, {})[model] = {}
            table[source][model] = summarize_model(
                losses,
                bootstrap_gaps=draws[source][model],
                reference_order="forward",
                n_tokens=np.full(60, 12),
                n_bytes=np.full(60, 15) if source == "demo" else None,
                floors=np.full(60, 25.0) if source == "markov" else None,
                n_boot=200,
            )
            natural = {o: Ragged.from_list(rng.gamma(2.0, 1.0, size=(60, 13))) for o in ORDERS}
            profiles[source][model] = position_profile(natural, reference_order="forward")
            if source == "markov":
                spans.setdefault(source, {})[model] = span_breakdown(
                    natural, {"x": (0, 6), "y": (6, 12)}
                )
            curves[source][model] = {
                o: [
                    [
                        {"epoch": e, "valid_bits_per_token": 4.0 - 0.2 * e + 0.01 * s}
                        for e in range(4)
                    ]
                    for s in range(n_seeds)
                ]
                for o in ORDERS
            }
    adjust_holm(table)
    simultaneous_intervals(table, draws)
    warning = seed_warning(n_seeds)
    return {
        "table": table,
        "profiles": profiles,
        "spans": spans,
        "curves": curves,
        "sweeps": {
            "context": {
                "source": "demo",
                "parameter": "order",
                "models": {"ngram_n2": 2, "ngram_n3": 3},
            }
        },
        "provenance": {"package_version": "0.1.0", "data": {"demo": "md5:0123abcd"}},
        "warnings": [warning] if warning else [],
    }


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    """(inputs, output folder) of one write_all call with 3 seeds; rendering PNGs is slow."""
    run = build_run()
    folder = tmp_path_factory.mktemp("report")
    write_all(folder, **run)
    return run, folder


def test_metrics_json_is_exactly_the_nested_table(written):
    run, folder = written
    metrics = json.loads((folder / "metrics.json").read_text())
    assert metrics == run["table"]
    assert set(metrics) == {"demo", "markov"}  # no extra top-level keys
    leaf = metrics["demo"]["ngram_n2"]["reverse"]
    for field in ("bits_per_token", "gap_pct", "gap_pct_low", "gap_pct_high", "p_value", "seeds"):
        assert field in leaf
    assert "bits_per_byte" in leaf and "floor_bits_per_token" not in leaf
    markov = metrics["markov"]["ngram_n2"]["reverse"]
    assert {"floor_bits_per_token", "excess_bits_per_token"} <= set(markov)


@pytest.mark.slow  # renders every PNG a second time
def test_metrics_json_is_byte_identical_across_two_runs(tmp_path):
    write_all(tmp_path / "a", **build_run())
    write_all(tmp_path / "b", **build_run())
    first = (tmp_path / "a" / "metrics.json").read_bytes()
    assert first == (tmp_path / "b" / "metrics.json").read_bytes()
    assert (tmp_path / "a" / "report.md").read_bytes() == (
        tmp_path / "b" / "report.md"
    ).read_bytes()
    for name in ("gaps.csv", "learning_curves.csv", "position_profile.csv", "sweep_context.csv"):
        assert (tmp_path / "a" / "plots" / name).read_bytes() == (
            tmp_path / "b" / "plots" / name
        ).read_bytes()


def test_metrics_keys_flatten_to_source_model_order_field_as_dvc_shows_them(written):
    metrics = json.loads((written[1] / "metrics.json").read_text())
    # DVC joins nested keys with dots (dvc metrics diff: "demo.ngram_n2.reverse.gap_pct");
    # common practice, no source.
    flat = {
        f"{s}.{m}.{o}.{k}": v
        for s, models in metrics.items()
        for m, orders in models.items()
        for o, leaf in orders.items()
        for k, v in leaf.items()
    }
    assert "demo.ngram_n2.reverse.gap_pct" in flat
    assert all(isinstance(v, (int, float, bool)) or v is None for v in flat.values())


def test_report_warns_when_too_few_seeds_and_carries_cautions_and_provenance(tmp_path):
    write_all(tmp_path, **build_run(n_seeds=2))
    report = (tmp_path / "report.md").read_text()
    assert "with 2 seeds the interval ignores training randomness" in report
    assert report.index("Warnings") < report.index("### Source `demo`")
    for caution in CAUTIONS:
        assert caution in report
    assert "md5:0123abcd" in report and "retrograde 0.1.0" in report
    assert "![gaps](plots/gaps.png)" in report
    assert "### Spans of `markov`" in report


def test_report_has_no_seed_warning_with_three_seeds(written):
    assert "Warnings" not in (written[1] / "report.md").read_text()


def test_markdown_table_marks_reference_and_significant_gaps():
    table = {
        "demo": {
            "ngram": {
                "forward": {
                    "bits_per_token": 2.0,
                    "gap_pct": 0.0,
                    "gap_pct_low": 0.0,
                    "gap_pct_high": 0.0,
                    "p_value": 1.0,
                    "seeds": 3,
                },
                "reverse": {
                    "bits_per_token": 2.2,
                    "gap_pct": 10.0,
                    "gap_pct_low": 8.0,
                    "gap_pct_high": 12.5,
                    "p_value": 0.0004,
                    "p_value_holm": 0.0004,
                    "significant": True,
                    "seeds": 3,
                    "seed_spread_pct": 0.5,
                },
            }
        }
    }
    text = format_table(table, "markdown")
    lines = text.splitlines()
    assert lines[0] == "### Source `demo`"
    assert "| `ngram` | `forward` | 2.0000 | reference |" in text
    assert (
        "| `ngram` | `reverse` | 2.2000 | +10.00 [+8.00, +12.50] | 0.50 | <0.001 | **yes** |"
        in text
    )
    assert is_reference_leaf(table["demo"]["ngram"]["forward"])
    assert not is_reference_leaf(table["demo"]["ngram"]["reverse"])


def test_json_format_is_the_bytes_of_metrics_json(written):
    run, folder = written
    assert format_table(run["table"], "json") == (folder / "metrics.json").read_text()


def test_csv_format_has_one_row_per_cell_readable_by_the_csv_module():
    run = build_run()
    rows = list(csv.DictReader(io.StringIO(format_table(run["table"], "csv"))))
    assert len(rows) == 2 * 2 * 3
    reverse = next(
        r for r in rows if (r["source"], r["model"], r["order"]) == ("demo", "ngram_n2", "reverse")
    )
    assert float(reverse["gap_pct"]) == run["table"]["demo"]["ngram_n2"]["reverse"]["gap_pct"]


def test_an_unknown_format_names_the_allowed_ones():
    with pytest.raises(ConfigError, match="allowed: one of 'markdown', 'json', 'csv'"):
        format_table({}, "html")


def test_a_sweep_over_a_missing_source_is_refused_before_anything_is_written(tmp_path):
    run = build_run()
    run["sweeps"] = {"width": {"source": "nope", "parameter": "hidden", "models": {}}}
    with pytest.raises(ConfigError, match="sweep 'width': source 'nope'"):
        write_all(tmp_path / "out", **run)
    assert not (tmp_path / "out").exists()


def test_report_warns_about_a_source_with_too_few_test_documents(tmp_path):
    run = build_run()
    for orders in run["table"]["demo"].values():
        for leaf in orders.values():
            leaf["documents"] = 3
    write_all(tmp_path, **{**run, "curves": {}, "profiles": {}, "sweeps": {}})
    report = (tmp_path / "report.md").read_text()
    assert "source 'demo' has only 3 test documents" in report
    assert "source 'markov'" not in report


def test_report_warns_when_every_seed_of_a_model_gave_the_same_losses(tmp_path):
    # An n-gram fit ignores its seed: the spread over seeds is exactly 0.
    losses = np.random.default_rng(5).gamma(4.0, 10.0, size=(1, 40))
    same_every_seed = {
        "forward": np.repeat(losses, 3, axis=0),
        "reverse": np.repeat(losses * 1.01, 3, axis=0),
    }
    leaves = summarize_model(same_every_seed, reference_order="forward", n_tokens=np.ones(40))
    table = adjust_holm({"markov": {"ngram": leaves}})
    assert leaves["reverse"]["seed_spread_pct"] == 0.0
    run = {
        "table": table,
        "profiles": {},
        "spans": {},
        "curves": {},
        "sweeps": {},
        "provenance": {},
        "warnings": [],
    }
    write_all(tmp_path, **run)
    report = (tmp_path / "report.md").read_text()
    assert "source 'markov': model 'ngram' gave identical losses for every seed" in report


@pytest.mark.dvc
def test_dvc_metrics_diff_keys_read_source_model_order_field(written, tmp_path):
    # Outside reference: DVC 3 itself flattens the nested metrics.json into dotted keys.
    run, folder = written
    repo = tmp_path / "host"
    metrics = repo / "pipelines" / "retrograde" / "metrics.json"
    metrics.parent.mkdir(parents=True)
    metrics.write_bytes((folder / "metrics.json").read_bytes())

    def tool(*argv):
        return subprocess.run(
            argv, cwd=repo, check=True, capture_output=True, text=True, stdin=subprocess.DEVNULL
        ).stdout

    tool("git", "init", "-q")
    tool(sys.executable, "-m", "dvc", "init", "-q")
    tool("git", "add", "-A")
    tool("git", "-c", "user.name=t", "-c", "user.email=t@localhost", "commit", "-qm", "one")
    changed = json.loads(metrics.read_text())
    changed["demo"]["ngram_n2"]["reverse"]["gap_pct"] += 1.0
    metrics.write_text(json.dumps(changed))
    diff = json.loads(
        tool(
            sys.executable,
            "-m",
            "dvc",
            "metrics",
            "diff",
            "HEAD",
            "--json",
            "--targets",
            "pipelines/retrograde/metrics.json",
        )
    )
    keys = diff["pipelines/retrograde/metrics.json"]
    assert list(keys) == ["demo.ngram_n2.reverse.gap_pct"]
    assert keys["demo.ngram_n2.reverse.gap_pct"]["diff"] == pytest.approx(1.0)
