"""The benchmark scripts still run (``--quick``: tiny sizes) and report consistent figures.

Benchmarks are not tests: nothing here asserts a speed. These tests keep the scripts from
rotting and pin down what they measure (the task both systems do, the stages DVC ran).
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from retrograde import SequenceSet

BENCHMARKS = Path(__file__).resolve().parent.parent / "benchmarks"
sys.path.insert(0, str(BENCHMARKS))

import _common  # noqa: E402
import _corpus  # noqa: E402


def _run_quick(script: str, out: Path) -> dict:
    argv = [sys.executable, str(BENCHMARKS / script), "--quick", "--out", str(out)]
    result = subprocess.run(argv, capture_output=True, text=True, check=False, timeout=900)
    assert result.returncode == 0, result.stderr[-3000:]
    return json.loads(out.read_text())


def test_peak_rss_sees_an_allocation_made_in_a_fresh_process(tmp_path):
    # Outside reference: numpy's own byte count of the array the child fills.
    script = tmp_path / "alloc.py"
    script.write_text(
        "import sys, numpy as np\n"
        f"sys.path.insert(0, {str(BENCHMARKS)!r})\n"
        "import _common\n"
        "before = _common.peak_rss_bytes()\n"
        "array = np.ones(256 * 2**20, dtype=np.uint8)\n"
        "print(before, _common.peak_rss_bytes(), array.nbytes)\n"
    )
    out = subprocess.run([sys.executable, str(script)], capture_output=True, text=True, check=True)
    before, after, nbytes = map(int, out.stdout.split())
    assert nbytes <= after - before < nbytes + 32 * 2**20


def test_prefix_takes_the_fewest_leading_units_holding_the_tokens_asked_for():
    units = SequenceSet.from_list([[1, 2], [3], [4, 5, 6], [7]], vocab_size=8)
    assert _corpus.prefix(units, 3).to_list()[-1].tolist() == [3]
    assert len(_corpus.prefix(units, 4)) == 3
    assert len(_corpus.prefix(units, 100)) == 4


def test_format_table_aligns_headers_and_formats_each_column():
    text = _common.format_table(
        [{"a": "x", "b": 1234.5}, {"a": "long", "b": None}], [("a", "A", ""), ("b", "B", ",.0f")]
    )
    assert text.splitlines() == ["A         B", "----  -----", "x     1,234", "long      -"]


@pytest.mark.slow
def test_ngram_benchmark_runs_quick_and_gives_nltk_the_same_events(tmp_path):
    results = _run_quick("bench_ngram.py", tmp_path / "ngram.json")
    for pair in results["versus_nltk"]:
        # Same task: NLTK's padding yields exactly the events our family scores, len + 1 per
        # unit (nltk.lm.preprocessing.pad_both_ends is the outside reference).
        assert pair["nltk"]["test_events"] == pair["ours"]["test_events"]
        assert pair["nltk"]["train_tokens"] == pair["ours"]["train_tokens"]
        assert pair["fit_ratio"] > 0 and pair["score_ratio"] > 0
    for row in results["grid"]:
        assert row["train_tokens"] >= row["size"]
        assert row["peak_rss_mib"] >= row["rss_before_fit_mib"] > 0
        assert row["test_events"] == row["test_tokens"] + row["test_units"]
    assert results["targets"]["large_case_train_tokens"] >= 60_000


@pytest.mark.slow
def test_mlp_benchmark_runs_quick_with_the_sklearn_reference(tmp_path):
    results = _run_quick("bench_mlp.py", tmp_path / "mlp.json")
    rows = {row["system"]: row for row in results["rows"]}
    assert rows["mlp"]["epochs_run"] == rows["sklearn"]["epochs_run"] == 2
    assert rows["mlp"]["train_tokens"] == rows["sklearn"]["train_tokens"]
    assert results["ratios"]["mlp_vs_sklearn_train"] > 0


def test_one_hot_windows_encode_the_previous_symbols_most_recent_first():
    import bench_mlp

    units = SequenceSet.from_list([[0, 1], [2]], vocab_size=3)
    matrix, outcomes = bench_mlp.one_hot_windows(units, window=2, vocab_size=3)
    # Events: 0 | 1 | end, then 2 | end; begin/end marker id 3; column = lag slot * 4 + id.
    assert outcomes.tolist() == [0, 1, 3, 2, 3]
    expected_columns = [[3, 7], [0, 7], [1, 4], [3, 7], [2, 7]]
    assert [sorted(row.indices.tolist()) for row in matrix] == expected_columns
    assert np.all(matrix.sum(axis=1) == 2)


@pytest.mark.slow
@pytest.mark.dvc
def test_pipeline_benchmark_times_scratch_noop_and_one_model_edit(tmp_path):
    results = _run_quick("bench_pipeline.py", tmp_path / "pipeline.json")
    runs = results["runs"]
    # DVC's own "Running stage" lines are the outside reference for what ran: 1 units,
    # 2 reorder, 4 fit (2 models x 2 orders x 1 seed) and the table; then nothing; then
    # the edited model's 2 cells and the table.
    ran = [runs[f"{name}_jobs1"]["stages_ran"] for name in ("scratch", "noop", "edit")]
    assert ran == [8, 0, 3]
    assert runs["edit_jobs1"]["fit_stages_ran"] == 2
    assert runs["scratch_jobs2"]["stages_ran"] == 8 and runs["noop_jobs2"]["stages_ran"] == 0
    assert runs["direct"]["in_process"]["fits"] == results["grid"]["fit_stages"] == 4
    assert results["summary"]["same_results_for_every_jobs"]
    for run in runs.values():
        assert run["cpu_seconds"] > 0 and run["wall_seconds"] > 0


def test_coverage_benchmark_chain_is_reversible_with_a_non_uniform_stationary_law():
    import bench_coverage

    from retrograde import orders

    transition, stationary = bench_coverage.reversible_chain(4, 0)
    flux = stationary[:, None] * transition  # detailed balance: pi_i P_ij = pi_j P_ji
    np.testing.assert_allclose(flux, flux.T, rtol=0, atol=1e-15)
    assert stationary.max() > 1.5 * stationary.min()
    # Outside reference: the source's own exact NLL gives a unit and its reversal one value.
    source = bench_coverage.reversible_source()
    units = source.generate(50, seed=1)
    reversed_units = orders.make("reverse").apply_set(units)
    np.testing.assert_allclose(source.nll(units), source.nll(reversed_units), rtol=1e-12)


@pytest.mark.slow
def test_coverage_benchmark_runs_quick_for_both_families_and_every_seed_count(tmp_path):
    results = _run_quick("bench_coverage.py", tmp_path / "coverage.json")
    rows = results["real"]["rows"]
    defaults = {(r["family"], r["seeds"], r["gap"]) for r in rows if r["interval"] == "t"}
    assert {
        (f, n, g) for f in ("ngram", "mlp") for n in (3, 5, 10) for g in ("whole", "content")
    } <= defaults
    for row in rows:
        assert 0.0 <= row["coverage"] <= 1.0 and 0.0 <= row["power_demo"] <= 1.0
        assert row["mean_width_pct"] > 0 and row["intervals"] >= 4
    assert set(results["real"]["quality"]) >= {"ngram_none", "ngram_half", "mlp"}


def test_torch_calibration_benchmark_runs_quick_and_records_both_orders(tmp_path):
    pytest.importorskip("torch")
    results = _run_quick("bench_torch_calibration.py", tmp_path / "calibration.json")
    assert [cell["order"] for cell in results["cells"]] == ["forward", "reverse"]
    weights = results["parity_weights"]
    # x is uniform: forwards its 10 bits follow from nothing before them; y = A x does.
    assert weights["forward"][:10] == [-1] * 10 and min(weights["forward"][10:]) >= 1
    assert weights["reverse"][:10] == [-1] * 10  # y is uniform too (A is invertible)
    summary = results["summary"]
    for order in ("forward", "reverse"):
        assert summary[f"{order}_excess_min"] <= summary[f"{order}_excess_max"]


def test_gf2_defaults_benchmark_reports_floor_and_gap_for_both_families(tmp_path):
    result = _run_quick("bench_gf2_defaults.py", tmp_path / "gf2.json")["results"]["quick"]
    for family in ("ngram", "mlp"):
        leaf = result["models"][family]["reverse"]
        assert leaf["floor_bits_per_token"] == 0.5  # n ln 2 nats over 2 n tokens = 1/2 bit
        assert leaf["gap_pct_low"] <= leaf["gap_pct"] <= leaf["gap_pct_high"]
