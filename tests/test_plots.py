"""Figures are written, non-empty, with labelled axes and grey-scale-distinguishable series."""

from __future__ import annotations

import csv

import pytest

from retrograde.report import _plots as plots
from retrograde.report import write_all
from test_report import build_run

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification, section 5.2 (from memory)


@pytest.fixture(scope="module")
def run():
    return build_run()


def test_every_figure_is_written_as_a_non_empty_png_with_its_csv(tmp_path, run):
    write_all(tmp_path, **run)
    folder = tmp_path / "plots"
    for stem in ("gaps", "learning_curves", "position_profile", "sweep_context"):
        png = (folder / f"{stem}.png").read_bytes()
        assert png.startswith(PNG_SIGNATURE) and len(png) > 5000
        with open(folder / f"{stem}.csv", newline="") as handle:
            assert len(list(csv.DictReader(handle))) > 0


def test_gap_figure_has_one_labelled_panel_per_source_with_intervals(run):
    figure = plots.gap_figure(run["table"])
    axes = [ax for ax in figure.axes if ax.get_visible()]
    assert [ax.get_title() for ax in axes] == ["source: demo", "source: markov"]
    for ax in axes:
        assert ax.get_xlabel() == "order"
        assert ax.get_ylabel() == "gap to reference order (%)"
        assert [t.get_text() for t in ax.get_xticklabels()] == [
            "forward",
            "reverse",
            "block_reverse",
        ]
        assert len(ax.containers) == 2  # one errorbar series per model


def test_series_differ_by_marker_not_only_colour(run):
    figure = plots.learning_curve_figure(run["curves"])
    ax = figure.axes[0]
    assert ax.get_xlabel() == "epoch"
    assert ax.get_ylabel() == "validation loss (bits per token)"
    labelled = [line for line in ax.get_lines() if not line.get_label().startswith("_")]
    assert [line.get_label() for line in labelled] == ["forward", "reverse", "block_reverse"]
    styles = {(line.get_marker(), line.get_linestyle()) for line in labelled}
    assert len(styles) == 3


def test_position_profile_figure_plots_differences_to_the_reference(run):
    figure = plots.profile_figure(run["profiles"])
    ax = figure.axes[0]
    assert ax.get_xlabel() == "position in unit, natural order (tokens)"
    assert ax.get_ylabel() == "loss minus forward (bits per token)"
    labels = [line.get_label() for line in ax.get_lines() if not line.get_label().startswith("_")]
    assert labels == ["reverse", "block_reverse"]
    reverse = next(line for line in ax.get_lines() if line.get_label() == "reverse")
    expected = run["profiles"]["demo"]["ngram_n2"]["diff_bits"]["reverse"]
    assert list(reverse.get_ydata()) == expected


def test_sweep_figure_puts_the_swept_value_on_the_x_axis(run):
    sweep = run["sweeps"]["context"]
    figure = plots.sweep_figure("context", sweep, run["table"])
    ax = figure.axes[0]
    assert ax.get_xlabel() == "order (swept value)"
    assert ax.get_ylabel() == "gap to reference order (%)"
    rows = plots.sweep_rows(sweep, run["table"])
    assert [r["order"] for r in rows if r["model"] == "ngram_n2"] == [
        "forward",
        "reverse",
        "block_reverse",
    ]
    # The swept parameter is an n-gram "order"; it must not overwrite the order column.
    assert [r["value"] for r in rows] == [2, 2, 2, 3, 3, 3]
    assert {r["parameter"] for r in rows} == {"order"}
    line = ax.containers[1].lines[0]  # errorbar series of the second order, "reverse"
    assert list(line.get_xdata()) == [2, 3]


def test_curves_without_validation_scores_draw_no_learning_curve_figure(tmp_path, run):
    curves = {"demo": {"ngram_n2": {"forward": [[], [{"epoch": 0, "valid_bits_per_token": None}]]}}}
    written = plots.write_plots(tmp_path, table=run["table"], profiles={}, curves=curves, sweeps={})
    assert written == ["gaps.png"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["gaps.csv", "gaps.png"]


def test_gaps_that_are_not_significant_are_drawn_hollow():
    def leaf(gap, significant):
        return {
            "gap_pct": gap,
            "gap_pct_low": gap - 1,
            "gap_pct_high": gap + 1,
            "bits_per_token": 2.0,
            "significant": significant,
        }

    table = {"demo": {"mlp": {"reverse": leaf(5.0, True), "stride": leaf(0.5, False)}}}
    ax = plots.gap_figure(table).axes[0]
    hollow = [line for line in ax.get_lines() if line.get_label() == "_not significant"]
    assert len(hollow) == 1
    assert list(hollow[0].get_ydata()) == [0.5] and hollow[0].get_markerfacecolor() == "white"
    assert hollow[0].get_zorder() > ax.containers[0].lines[0].get_zorder()  # drawn on top
