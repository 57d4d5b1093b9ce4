"""The command family: runs an external trainer without a shell and checks what it returns."""

import contextlib
import math
import os
import select
import signal
import sys
from collections import Counter

import numpy as np
import pytest

from _trainers import FIT, TOY, counting_fit_command
from retrograde import SequenceSet
from retrograde.errors import ConfigError, DataError, FitError
from retrograde.families import load, make

SCORE = [sys.executable, TOY, "score", "--model", "{model}", "--test", "{test}", "--out", "{out}"]

TRAIN = SequenceSet.from_list([[0, 1, 2, 1], [2, 2, 0], [1], [0, 1, 2, 2, 1]], vocab_size=4)
VALID = SequenceSet.from_list([[0, 1], [2, 1, 0]], vocab_size=4)
TEST = SequenceSet.from_list([[1, 2, 0], [], [3, 3]], vocab_size=4)


def add_k_bigram_logprobs(train, units, k=0.5):
    """Reference add-k bigram (Jurafsky & Martin, Speech and Language Processing, 3rd ed.,
    section 3.5 "add-k smoothing"; from memory): p(w|c) = (n(c,w) + k) / (n(c) + k |W|)."""
    vocab_size = train.vocab_size
    begin = end = vocab_size
    pairs = Counter()
    for unit in train:
        symbols = [begin, *unit.tolist(), end]
        pairs.update(zip(symbols[:-1], symbols[1:], strict=True))
    context_totals = Counter()
    for (context, _), n in pairs.items():
        context_totals[context] += n
    rows = []
    for unit in units:
        symbols = [begin, *unit.tolist(), end]
        rows.append(
            [
                math.log((pairs[(c, w)] + k) / (context_totals[c] + k * (vocab_size + 1)))
                for c, w in zip(symbols[:-1], symbols[1:], strict=True)
            ]
        )
    return rows


def failing_trainer(tmp_path, body):
    """A trainer script: ``args['test']`` / ``args['out']`` folders, then ``body``."""
    script = tmp_path / "trainer.py"
    script.write_text(
        "import json, sys, time\nimport numpy as np\nfrom pathlib import Path\n"
        "args = dict(a.split('=', 1) for a in sys.argv[1:])\n"
        "meta = json.loads(Path(args['test'], 'meta.json').read_text())\n"
        "n = meta['n_tokens'] + meta['n_units']\n"
        "out = Path(args['out'], 'logprobs.npy')\n" + body
    )
    return make("command", command=[sys.executable, str(script), "test={test}", "out={out}"])


def test_the_example_trainer_scores_like_a_reference_add_k_bigram():
    model = make("command", command=FIT).fit(TRAIN, VALID, seed=3)
    scores = model.logprobs(TEST)
    assert scores.lengths.tolist() == [4, 1, 3]
    for got, expected in zip(scores, add_k_bigram_logprobs(TRAIN, TEST), strict=True):
        np.testing.assert_allclose(got, expected, rtol=1e-12)


def test_the_learning_curve_comes_from_the_trainers_curve_json():
    model = make("command", command=FIT).fit(TRAIN, VALID)
    nats = -sum(sum(row) for row in add_k_bigram_logprobs(TRAIN, VALID))
    expected_bits = nats / math.log(2) / len(VALID.tokens)
    assert model.learning_curve_ == [
        {"epoch": 1, "valid_bits_per_token": pytest.approx(expected_bits)}
    ]


def test_with_a_score_command_the_fitted_trainer_folder_is_reused_saved_and_reloaded(tmp_path):
    model = make("command", command=FIT, score_command=SCORE).fit(TRAIN, VALID)
    scores = model.logprobs(TEST).values
    model.save(tmp_path / "model")
    assert (tmp_path / "model" / "trainer" / "model.npz").is_file()
    reloaded = load(tmp_path / "model")
    np.testing.assert_array_equal(reloaded.logprobs(TEST).values, scores)
    np.testing.assert_allclose(
        scores, np.concatenate(add_k_bigram_logprobs(TRAIN, TEST)), rtol=1e-12
    )


def test_fit_logprobs_without_a_score_command_trains_once(tmp_path):
    command, runs = counting_fit_command(tmp_path)
    twice = make("command", command=command).fit(TRAIN, VALID, seed=1)
    expected = twice.logprobs(TEST).values
    assert runs.read_text().count("run") == 2  # fit on valid, then again for test
    runs.unlink()
    once = make("command", command=command)
    rows = once.fit_logprobs(TRAIN, VALID, TEST, seed=1)
    assert runs.read_text().count("run") == 1
    np.testing.assert_array_equal(rows.values, expected)
    assert rows.lengths.tolist() == (TEST.lengths + 1).tolist()
    assert once.learning_curve_ == twice.learning_curve_  # from the trainer's curve.json
    # Outside reference: the add-k bigram written out by hand.
    np.testing.assert_allclose(rows.values, np.concatenate(add_k_bigram_logprobs(TRAIN, TEST)))


def test_fit_logprobs_refuses_test_ids_outside_the_training_vocabulary(tmp_path):
    command, runs = counting_fit_command(tmp_path)
    wide = SequenceSet.from_list([[1, 7]], vocab_size=8)
    with pytest.raises(DataError, match="token id 7 is outside the fitted vocabulary of 4"):
        make("command", command=command).fit_logprobs(TRAIN, VALID, wide, seed=0)
    assert not runs.exists()  # refused before the trainer ran


def test_full_distributions_from_the_trainer_sum_to_one():
    model = make("command", command=FIT).fit(TRAIN, VALID)
    probs = model.next_token_probs([np.array([0, 1]), np.array([], dtype=np.int32)])
    np.testing.assert_allclose(probs.sum(axis=1), 1.0, atol=1e-12)


def test_arguments_reach_the_trainer_verbatim_never_through_a_shell(tmp_path):
    marker = tmp_path / "injected"
    model = failing_trainer(
        tmp_path,
        "Path(args['out'], 'argv.json').write_text(json.dumps(sys.argv[1:]))\n"
        "np.save(out, np.full(n, -1.0))\n",
    )
    model.command = [*model.command, f"x=$(touch {marker}); touch {marker}"]
    model.fit(TRAIN)  # fit's {test} is the (empty) validation set
    assert not marker.exists()


def test_output_of_the_wrong_length_is_refused_with_the_stderr_tail(tmp_path):
    model = failing_trainer(
        tmp_path, "print('loaded 7 weights', file=sys.stderr)\nnp.save(out, np.full(n + 1, -1.0))\n"
    )
    # fit already scores the validation units (2 units, 5 tokens: 7 values expected)
    with pytest.raises(FitError, match=r"expected float64 \(7,\).*stderr tail: loaded 7 weights"):
        model.fit(TRAIN, VALID)


def test_non_finite_log_probabilities_are_refused(tmp_path):
    model = failing_trainer(tmp_path, "v = np.full(n, -1.0)\nv[1:] = np.nan\nnp.save(out, v)\n")
    with pytest.raises(FitError, match=r"not finite and <= 0 \(first at flat index 1: nan\)"):
        model.fit(TRAIN, VALID)


def test_positive_log_probabilities_are_refused(tmp_path):
    model = failing_trainer(tmp_path, "v = np.full(n, -1.0)\nv[-1] = 0.25\nnp.save(out, v)\n")
    with pytest.raises(FitError, match=r"first at flat index 6: 0.25"):
        model.fit(TRAIN, VALID)


def test_a_failing_trainer_is_reported_with_its_exit_status_and_stderr_tail(tmp_path):
    model = failing_trainer(tmp_path, "sys.exit('CUDA out of memory')\n")
    with pytest.raises(FitError, match=r"exited with status 1; stderr tail: CUDA out of memory"):
        model.fit(TRAIN, VALID)


def test_a_trainer_that_writes_nothing_is_refused(tmp_path):
    model = failing_trainer(tmp_path, "print('done', file=sys.stderr)\n")
    with pytest.raises(FitError, match=r"wrote no \{out\}/logprobs.npy.*stderr tail: done"):
        model.fit(TRAIN, VALID)


def test_a_trainer_that_exceeds_its_timeout_is_stopped(tmp_path):
    model = failing_trainer(tmp_path, "time.sleep(30)\n")
    model.timeout = 0.5
    with pytest.raises(FitError, match=r"did not finish within 0.5 s"):
        model.fit(TRAIN, VALID)


def test_a_trainer_timeout_kills_the_processes_the_trainer_started(tmp_path):
    pid_file = tmp_path / "child.pid"
    script = tmp_path / "spawning_trainer.py"
    script.write_text(
        "import subprocess, sys, time\n"
        "child = subprocess.Popen([sys.executable, '-c', 'import time; time.sleep(600)'])\n"
        f"open({str(pid_file)!r}, 'w').write(str(child.pid))\n"
        "time.sleep(600)\n"
    )
    model = make("command", command=[sys.executable, str(script), "{out}"], timeout=3)
    try:
        with pytest.raises(FitError, match=r"did not finish within 3 s \(it and every"):
            model.fit(TRAIN, VALID)
        child = int(pid_file.read_text())
        assert _has_exited(child), "the trainer's child outlived the trainer's timeout"
    finally:
        if pid_file.exists():
            with contextlib.suppress(ProcessLookupError):
                os.kill(int(pid_file.read_text()), signal.SIGKILL)


def _has_exited(pid: int) -> bool:
    """Whether ``pid`` (not our child) has exited, waiting on its pidfd rather than a clock.

    The bound only keeps a wrong implementation from hanging the test; a killed process
    makes its pidfd readable at once.
    """
    try:
        fd = os.pidfd_open(pid)
    except ProcessLookupError:
        return True  # exited and already reaped
    try:
        readable, _, _ = select.select([fd], [], [], 60)
        return bool(readable)
    finally:
        os.close(fd)


def test_a_missing_program_is_reported_by_name():
    model = make("command", command=["/nonexistent/trainer", "{out}"])
    with pytest.raises(FitError, match=r"program '/nonexistent/trainer' was not found"):
        model.fit(TRAIN, VALID)


@pytest.mark.parametrize(
    ("params", "message"),
    [
        (
            {"command": "python train.py"},
            r"command='python train.py' is invalid; allowed: a non-empty list",
        ),
        ({"command": []}, r"command=\[\] is invalid"),
        (
            {"command": ["train", "{tset}"]},
            r".* is invalid; allowed: placeholders .* \(found \{tset\}\)",
        ),
        ({"command": ["t"], "score_command": ["s", "{train}"]}, r"score_command=.*found \{train\}"),
        ({"command": ["t"], "timeout": 0}, r"timeout=0 is invalid"),
    ],
)
def test_invalid_parameters_are_refused_naming_key_value_and_what_is_allowed(params, message):
    with pytest.raises(ConfigError, match=r"family 'command': parameter " + message):
        make("command", **params).fit(TRAIN)


def test_no_temporary_folders_are_left_behind_after_a_fit_or_a_failure(tmp_path, monkeypatch):
    import tempfile

    scratch = tmp_path / "scratch"
    scratch.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(scratch))
    make("command", command=FIT).fit(TRAIN, VALID).logprobs(TEST)
    assert list(scratch.iterdir()) == []
    with pytest.raises(FitError):
        failing_trainer(tmp_path, "sys.exit(3)\n").fit(TRAIN, VALID)
    assert list(scratch.iterdir()) == []


# ------------------------------------------------------------------ normalization probe
# A trainer that claims log p = -1e-9 for every token reports 0.0000 bits/token; only the
# probe (full distributions at sampled positions, docs/trainers.md) shows it is no model.
_PROBE_HEAD = (
    "probe = np.load(Path(args['test'], 'probe.npy'))\n"
    "V = meta['vocab_size']\n"
    "probe_out = Path(args['out'], 'probe_logprobs.npy')\n"
)


def test_a_trainer_that_claims_near_certainty_without_a_probe_is_refused(tmp_path):
    model = failing_trainer(tmp_path, "np.save(out, np.full(n, -1e-9))\n")
    with pytest.raises(FitError, match=r"wrote no \{out\}/probe_logprobs.npy.*docs/trainers.md"):
        model.fit_logprobs(TRAIN, VALID, TEST)


def test_a_probe_whose_probabilities_do_not_sum_to_one_is_refused(tmp_path):
    body = _PROBE_HEAD + (
        "np.save(out, np.full(n, -1e-9))\n"
        "np.save(probe_out, np.full((len(probe), V + 1), -1e-9))\n"  # every outcome ~certain
    )
    model = failing_trainer(tmp_path, body)
    with pytest.raises(FitError, match=r"position \d+ sum to 5, not 1"):
        model.fit_logprobs(TRAIN, VALID, TEST)


def test_a_probe_that_disagrees_with_the_per_token_values_is_refused(tmp_path):
    # A proper uniform distribution in the probe, but -1e-9 claimed for every token.
    body = _PROBE_HEAD + (
        "np.save(out, np.full(n, -1e-9))\n"
        "np.save(probe_out, np.full((len(probe), V + 1), -np.log(V + 1)))\n"
    )
    model = failing_trainer(tmp_path, body)
    with pytest.raises(FitError, match=r"reported log-probability -1e-09 disagrees"):
        model.fit_logprobs(TRAIN, VALID, TEST)


def test_a_probe_of_the_wrong_shape_is_refused(tmp_path):
    body = _PROBE_HEAD + (
        "np.save(out, np.full(n, -np.log(V + 1)))\n"
        "np.save(probe_out, np.full((len(probe), V), -np.log(V)))\n"  # end marker left out
    )
    model = failing_trainer(tmp_path, body)
    with pytest.raises(FitError, match=r"expected float64 \(\d+, 5\)"):
        model.fit_logprobs(TRAIN, VALID, TEST)


def test_the_example_trainer_writes_probes_that_match_its_scores():
    from retrograde.families import check_probe, probe_positions

    model = make("command", command=FIT)
    values = model.fit_logprobs(TRAIN, VALID, TEST, seed=3).values
    positions = probe_positions(TEST, 16, seed=3)
    distributions = model.probe_logprobs(TEST, positions)
    check_probe("toy", TEST, values, positions, distributions)  # raises when wrong
    # All 8 test events (6 tokens + 3 end markers, fewer than 16) are probed.
    assert len(positions) == len(TEST.tokens) + len(TEST)
