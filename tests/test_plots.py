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
        assert ax.get_ylabel() == "gap to forward (%)"  # the reference order, named
        # the reference order is not a category: its gap is 0 by definition
        assert [t.get_text() for t in ax.get_xticklabels()] == ["reverse", "block_reverse"]
        assert len(ax.containers) == 2  # one errorbar series per model
        # side by side within 0.3 of the tick, never nearer the next category
        for container in ax.containers:
            for x in container.lines[0].get_xdata():
                assert abs(x - round(x)) <= 0.15 + 1e-9
    caption = figure.get_supxlabel()
    assert "simultaneous intervals" in caption and "Holm" in caption


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
    assert ax.get_ylabel() == "gap to forward (%)"
    rows = plots.sweep_rows(sweep, run["table"])
    assert [r["order"] for r in rows if r["model"] == "ngram_n2"] == [
        "forward",
        "reverse",
        "block_reverse",
    ]
    # The swept parameter is an n-gram "order"; it must not overwrite the order column.
    assert [r["value"] for r in rows] == [2, 2, 2, 3, 3, 3]
    assert {r["parameter"] for r in rows} == {"order"}
    # the reference order (gap 0 by definition) is not drawn: the first series is "reverse",
    # dodged left by 1% of the swept range so the two orders' bars do not hide each other
    assert [c.get_label() for c in ax.containers] == ["reverse", "block_reverse"]
    line = ax.containers[0].lines[0]
    assert list(line.get_xdata()) == pytest.approx([2 - 0.01, 3 - 0.01])


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


def test_gap_bars_are_the_simultaneous_intervals_the_report_shows(run):
    figure = plots.gap_figure(run["table"])
    ax = figure.axes[0]
    leaf = run["table"]["demo"]["ngram_n2"]["reverse"]
    segments = ax.containers[0].lines[2][0].get_segments()  # the model's error bars
    low, high = segments[0][:, 1]
    assert (low, high) == pytest.approx(
        (leaf["gap_pct_simultaneous_low"], leaf["gap_pct_simultaneous_high"])
    )


def test_without_simultaneous_intervals_the_caption_states_the_per_cell_level(run):
    table = {"s": {"m": {"forward": dict(FORWARD), "reverse": dict(REVERSE)}}}
    caption = plots.gap_figure(table, level=0.9).get_supxlabel()
    assert "90% per-cell intervals" in caption


FORWARD = {"gap_pct": 0.0, "gap_pct_low": 0.0, "gap_pct_high": 0.0, "bits_per_token": 2.0}
REVERSE = {"gap_pct": 3.0, "gap_pct_low": 1.0, "gap_pct_high": 5.0, "bits_per_token": 2.1}


def curve(*values):
    return [{"epoch": i + 1, "valid_bits_per_token": v} for i, v in enumerate(values)]


def test_learning_curves_tell_seeds_apart_mark_the_kept_epoch_and_skip_one_point_fits():
    curves = {
        "s": {
            "mlp": {"forward": [curve(3.0, 2.5, 2.6), curve(3.1, 2.7, 2.4)]},
            "ngram": {"forward": [curve(2.2), curve(2.2)]},
        }
    }
    figure = plots.learning_curve_figure(curves)
    visible = [ax for ax in figure.axes if ax.get_visible()]
    assert [ax.get_title() for ax in visible] == ["s / mlp"]  # one point per fit: no panel
    assert "not drawn (one validation score per fit, no epochs): s / ngram" in (
        figure.get_supxlabel().replace("\n", " ")
    )
    ax = visible[0]
    lines = [line for line in ax.get_lines() if not line.get_label().startswith("_")]
    assert len(lines) == 1  # one legend entry per order...
    series = [line for line in ax.get_lines() if line.get_marker() != "*"]
    assert {line.get_linestyle() for line in series} == {"-", "--"}  # ...and a style per seed
    kept = [line for line in ax.get_lines() if line.get_marker() == "*"]
    assert [(list(k.get_xdata()), list(k.get_ydata())) for k in kept] == [
        ([2], [2.5]),
        ([3], [2.4]),
    ]


def test_a_flat_learning_curve_is_not_magnified_into_noise():
    curves = {"s": {"mlp": {"forward": [curve(1.50000, 1.50004, 1.50002)]}}}
    ax = plots.learning_curve_figure(curves).axes[0]
    low, high = ax.get_ylim()
    assert high - low >= 0.05  # at least 0.05 bits shown, not 4e-5


def test_profiles_with_token_and_fraction_positions_go_to_separate_figures(tmp_path, run):
    profiles = {
        "fixed": {"m": dict(run["profiles"]["demo"]["ngram_n2"])},
        "lines": {"m": dict(run["profiles"]["demo"]["ngram_n2"], position="relative")},
    }
    written = plots.write_plots(
        tmp_path, table=run["table"], profiles=profiles, curves={}, sweeps={}
    )
    assert written == ["gaps.png", "position_profile.png", "position_profile_relative.png"]
    absolute = plots.profile_figure(profiles, "absolute")
    assert [ax.get_title().splitlines()[0] for ax in absolute.axes] == ["fixed / m"]
    relative = plots.profile_figure(profiles, "relative")
    assert relative.axes[0].get_xlabel().endswith("(fraction of the unit)")


def test_the_profile_band_and_counts_are_drawn(run):
    figure = plots.profile_figure(run["profiles"])
    ax = figure.axes[0]
    assert len(ax.collections) == 2  # one band per non-reference order
    assert "units" in ax.get_title() and "tokens per point" in ax.get_title()


def test_figures_are_byte_identical_for_the_same_inputs(tmp_path, run):
    first, second = tmp_path / "a", tmp_path / "b"
    for folder in (first, second):
        folder.mkdir()
        plots.write_plots(
            folder,
            table=run["table"],
            profiles=run["profiles"],
            curves=run["curves"],
            sweeps=run["sweeps"],
        )
    assert sorted(p.name for p in first.iterdir()) == sorted(p.name for p in second.iterdir())
    for path in first.iterdir():
        assert path.read_bytes() == (second / path.name).read_bytes(), path.name


def test_sweep_figure_title_says_what_every_value_held_equal(run, tmp_path):
    sweep = {**run["sweeps"]["context"], "held": "optimizer steps (step_budget=500)"}
    figure = plots.sweep_figure("context", sweep, run["table"])
    title = figure.axes[0].get_title()
    assert title.endswith("equal for every value: optimizer steps (step_budget=500)")
    figure.savefig(tmp_path / "sweep.png")
