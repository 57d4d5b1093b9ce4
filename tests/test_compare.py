"""`retrograde compare` and `retrograde table` on a real temporary git repository."""

from __future__ import annotations

import csv
import io
import json
import subprocess

import pytest

from retrograde.cli import main
from retrograde.report import compare_tables, format_changes

METRICS = "pipelines/retrograde/metrics.json"


def leaf(gap: float, low: float, high: float) -> dict:
    return {
        "bits_per_token": 2.0,
        "gap_pct": gap,
        "gap_pct_low": low,
        "gap_pct_high": high,
        "p_value": 0.01,
        "seeds": 3,
    }


def git(repo, *args):
    subprocess.run(["git", *args], cwd=repo, check=True, capture_output=True, text=True)


def commit_table(repo, table, message):
    path = repo / METRICS
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(table, indent=2, sort_keys=True) + "\n")
    git(repo, "add", METRICS)
    git(repo, "commit", "-q", "-m", message)


@pytest.fixture
def repo(tmp_path):
    """A git repository with two commits of metrics.json: `first` and `second` (HEAD)."""
    git(tmp_path, "init", "-q")
    git(tmp_path, "config", "user.name", "retrograde tests")
    git(tmp_path, "config", "user.email", "tests@localhost")
    commit_table(
        tmp_path,
        {
            "demo": {
                "mlp": {
                    "forward": leaf(0.0, 0.0, 0.0),
                    "reverse": leaf(2.0, 1.0, 3.0),
                    "stride": leaf(1.0, 0.0, 2.0),
                    "rotate": leaf(0.5, -0.5, 1.5),
                }
            }
        },
        "first",
    )
    git(tmp_path, "tag", "first")
    commit_table(
        tmp_path,
        {
            "demo": {
                "mlp": {
                    "forward": leaf(0.0, 0.0, 0.0),
                    "reverse": leaf(6.0, 5.0, 7.0),  # intervals [1, 3] and [5, 7] do not overlap
                    "stride": leaf(1.5, 0.5, 2.5),  # moved, intervals overlap
                    "permutation": leaf(9.0, 8.0, 10.0),  # new cell; "rotate" is gone
                }
            }
        },
        "second",
    )
    return tmp_path


def test_compare_prints_both_gaps_and_marks_a_change_beyond_the_intervals(repo, capsys):
    assert main(["compare", "first", "HEAD", "--dir", str(repo)]) == 0
    lines = capsys.readouterr().out.splitlines()
    by_cell = {line.split()[0]: line for line in lines[1:-1]}
    assert "+2.00 [+1.00, +3.00]" in by_cell["demo.mlp.reverse"]
    assert "+6.00 [+5.00, +7.00]" in by_cell["demo.mlp.reverse"]
    assert by_cell["demo.mlp.reverse"].endswith("CHANGED")
    assert by_cell["demo.mlp.stride"].endswith("within")
    assert by_cell["demo.mlp.rotate"].endswith("removed")
    assert by_cell["demo.mlp.permutation"].endswith("added")
    assert "demo.mlp.forward" not in by_cell  # identical cells are left out without --all
    assert lines[-1] == (
        "5 cells: 1 changed beyond both intervals, 1 moved within them, 0 with the same gap "
        "but other bits/token, 1 added, 1 removed, 1 identical"
    )


def test_fail_on_change_exits_1_only_when_a_gap_changed_beyond_its_intervals(repo, capsys):
    assert main(["compare", "first", "HEAD", "--dir", str(repo), "--fail-on-change"]) == 1
    assert main(["compare", "HEAD", "--dir", str(repo), "--fail-on-change"]) == 0
    assert "0 changed beyond both intervals" in capsys.readouterr().out


def test_compare_defaults_to_the_working_tree_for_the_second_table(repo, capsys):
    table = json.loads((repo / METRICS).read_text())
    table["demo"]["mlp"]["stride"] = leaf(20.0, 19.0, 21.0)
    (repo / METRICS).write_text(json.dumps(table))
    assert main(["compare", "HEAD", "--dir", str(repo), "--all"]) == 0
    out = capsys.readouterr().out
    assert "gap % workspace" in out.splitlines()[0]
    assert any(
        line.startswith("demo.mlp.stride") and line.endswith("CHANGED") for line in out.splitlines()
    )
    assert any(line.startswith("demo.mlp.forward") for line in out.splitlines())  # --all


def test_a_bad_revision_is_one_line_and_exit_status_2(repo, capsys):
    assert main(["compare", "no-such-branch", "--dir", str(repo)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1
    assert "revision 'no-such-branch' is not a commit" in err


def test_a_revision_without_metrics_is_a_data_error(repo, capsys):
    git(repo, "commit", "-q", "--allow-empty", "-m", "unrelated")
    git(repo, "rm", "-q", METRICS)
    git(repo, "commit", "-q", "-m", "drop metrics")
    assert main(["compare", "first", "HEAD", "--dir", str(repo)]) == 2
    err = capsys.readouterr().err
    assert f"{METRICS} does not exist at revision 'HEAD'" in err and "retrograde run" in err


def test_table_prints_the_current_metrics_in_each_format(repo, capsys):
    assert main(["table", "--dir", str(repo), "--format", "csv"]) == 0
    csv_lines = capsys.readouterr().out.splitlines()
    assert csv_lines[0].startswith("source,model,order,bits_per_token")
    assert "demo,mlp,reverse,2.0,6.0,5.0,7.0,0.01,3" in csv_lines
    assert main(["table", "--dir", str(repo), "--format", "json"]) == 0
    assert json.loads(capsys.readouterr().out) == json.loads((repo / METRICS).read_text())
    assert main(["table", "--dir", str(repo)]) == 0
    assert "| `mlp` | `reverse` | 2.0000 | +6.00 [+5.00, +7.00] |" in capsys.readouterr().out


def test_table_without_metrics_says_to_run_first(tmp_path, capsys):
    assert main(["table", "--dir", str(tmp_path)]) == 2
    assert "run `retrograde run` first" in capsys.readouterr().err


def test_touching_intervals_overlap_and_are_not_a_change():
    old = {"s": {"m": {"o": leaf(1.0, 0.0, 2.0)}}}
    new = {"s": {"m": {"o": leaf(3.0, 2.0, 4.0)}}}
    (change,) = compare_tables(old, new)
    assert change.status == "within"
    text = format_changes([change], old_label="a", new_label="b")
    assert text.splitlines()[-1].startswith("1 cells: 0 changed")


def test_a_path_outside_the_repository_is_a_config_error(repo, tmp_path_factory, capsys):
    elsewhere = tmp_path_factory.mktemp("elsewhere") / "metrics.json"
    assert main(["compare", "HEAD", "--dir", str(repo), "--path", str(elsewhere)]) == 2
    assert "is outside the git repository" in capsys.readouterr().err


def test_markdown_format_gives_a_pipe_table_for_a_pull_request(repo, capsys):
    assert main(["compare", "first", "HEAD", "--dir", str(repo), "--format", "markdown"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0] == (
        "| cell | gap % first | gap % HEAD | bits/token first | bits/token HEAD "
        "| change bits/token | status |"
    )
    assert (
        "| `demo.mlp.reverse` | +2.00 [+1.00, +3.00] | +6.00 [+5.00, +7.00] | 2.0000 | 2.0000 "
        "| +0.0000 (+0.0%) | **CHANGED** |" in lines
    )


def test_table_prints_cautions_to_stderr_and_keeps_stdout_machine_readable(tmp_path, capsys):
    metrics = tmp_path / METRICS
    metrics.parent.mkdir(parents=True)
    cell = leaf(2.0, 1.0, 3.0) | {"documents": 2}
    metrics.write_text(json.dumps({"demo": {"mlp": {"reverse": cell}}}))
    assert main(["table", "--dir", str(tmp_path), "--format", "json"]) == 0
    captured = capsys.readouterr()
    assert json.loads(captured.out)["demo"]["mlp"]["reverse"]["documents"] == 2
    assert "retrograde: warning: source 'demo' has only 2 test documents" in captured.err


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ('{"demo": {"mlp": {"reverse": {"gap_pct": 1.0}}}}', "has no numeric bits_per_token"),
        (
            '{"demo": {"mlp": {"reverse": {"bits_per_token": 2.0, "gap_pct": 1.0, '
            '"gap_pct_low": 0.5}}}}',
            "cell demo.mlp.reverse has no numeric gap_pct_high (found None)",
        ),
        (json.dumps({"demo": {"mlp": {"reverse": leaf(float("nan"), 1.0, 3.0)}}}), "gap_pct=nan"),
        (
            json.dumps(
                {"demo": {"mlp": {"reverse": leaf(1.0, 0.0, 2.0) | {"p_value": float("inf")}}}}
            ),
            "p_value=inf",
        ),
        (json.dumps({"demo": {"mlp": {"reverse": leaf("big", 1.0, 3.0)}}}), "numeric gap_pct"),
        ('{"demo": {"mlp": [1, 2]}}', "demo.mlp holds list"),
        ("[1, 2]", "expected {source: {model: {order: {field: number}}}}, got list"),
    ],
)
@pytest.mark.parametrize("fmt", ["markdown", "json", "csv"])
def test_table_on_a_metrics_file_with_missing_keys_or_nan_is_one_line(
    tmp_path, capsys, text, expected, fmt
):
    metrics = tmp_path / METRICS
    metrics.parent.mkdir(parents=True)
    metrics.write_text(text)
    assert main(["table", "--dir", str(tmp_path), "--format", fmt]) == 2
    out, err = capsys.readouterr()
    assert out == "" and err.count("\n") == 1
    assert err.startswith(f"retrograde: error: {metrics}: ") and expected in err
    assert "regenerate it with `retrograde run`" in err


def test_table_on_a_metrics_file_that_is_not_utf8_is_one_line(tmp_path, capsys):
    metrics = tmp_path / METRICS
    metrics.parent.mkdir(parents=True)
    metrics.write_bytes(b'{"d\xe9mo": {}}')
    assert main(["table", "--dir", str(tmp_path)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "not UTF-8 (byte offset 3)" in err


def test_compare_against_a_revision_whose_table_holds_nan_is_one_line(repo, capsys):
    commit_table(repo, {"demo": {"mlp": {"reverse": leaf(float("nan"), 1.0, 3.0)}}}, "broken")
    assert main(["compare", "first", "HEAD", "--dir", str(repo)]) == 2
    err = capsys.readouterr().err
    assert (
        err.count("\n") == 1 and f"{METRICS} at HEAD: cell demo.mlp.reverse has gap_pct=nan" in err
    )


def with_bits(gap: float, low: float, high: float, bits: float) -> dict:
    return leaf(gap, low, high) | {"bits_per_token": bits}


# A larger n-gram context: every order gets better by the same share, so the gaps stay,
# and only bits per token tell that anything happened.
BEFORE = {
    "corpus": {
        "ngram": {
            "forward": with_bits(0.0, 0.0, 0.0, 3.19),
            "reverse": with_bits(1.0, 0.5, 1.5, 3.2219),
        }
    }
}
AFTER = {
    "corpus": {
        "ngram": {
            "forward": with_bits(0.0, 0.0, 0.0, 2.50),
            "reverse": with_bits(1.0, 0.5, 1.5, 2.525),
        }
    }
}


def test_a_better_model_with_the_same_gaps_is_not_called_same_and_shows_bits_per_token():
    changes = compare_tables(BEFORE, AFTER)
    assert [c.status for c in changes] == ["loss", "loss"]
    assert changes[0].bits_change == pytest.approx(2.50 - 3.19)  # plain subtraction
    text = format_changes(changes, old_label="order3", new_label="order5")
    forward = next(line for line in text.splitlines() if line.startswith("corpus.ngram.forward"))
    # 100 * (2.50 - 3.19) / 3.19 = -21.63%: the relative change, by hand
    assert "3.1900" in forward and "2.5000" in forward and "-0.6900 (-21.6%)" in forward
    assert forward.split()[-1] == "loss"
    assert "2 with the same gap but other bits/token" in text.splitlines()[-1]


def test_compare_writes_csv_and_json_with_both_revisions_side_by_side():
    changes = compare_tables(BEFORE, AFTER)
    rows = list(
        csv.DictReader(
            io.StringIO(format_changes(changes, old_label="a", new_label="b", fmt="csv"))
        )
    )
    assert [r["order"] for r in rows] == ["forward", "reverse"]
    assert rows[0]["bits_per_token_a"] == "3.19" and rows[0]["bits_per_token_b"] == "2.5"
    assert float(rows[0]["bits_per_token_change"]) == pytest.approx(-0.69)
    assert rows[1]["gap_pct_a"] == rows[1]["gap_pct_b"] == "1.0"
    document = json.loads(format_changes(changes, old_label="a", new_label="b", fmt="json"))
    assert document["rev_a"] == "a" and document["counts"]["loss"] == 2
    assert document["cells"][1]["gap_pct_low_b"] == 0.5
    assert document["cells"][1]["bits_per_token_change"] == pytest.approx(2.525 - 3.2219)


def test_compare_cli_takes_csv_and_json(repo, capsys):
    assert main(["compare", "first", "HEAD", "--dir", str(repo), "--format", "csv"]) == 0
    out = capsys.readouterr().out
    assert out.splitlines()[0].startswith("source,model,order,status,gap_pct_a")
    assert main(["compare", "first", "HEAD", "--dir", str(repo), "--format", "json"]) == 0
    statuses = {c["order"]: c["status"] for c in json.loads(capsys.readouterr().out)["cells"]}
    assert statuses["reverse"] == "changed" and statuses["permutation"] == "added"
