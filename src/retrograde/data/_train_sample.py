"""Which training units a seed trains on, for families whose fit has no randomness of its own.

An ``ngram`` fit is a deterministic function of its training units: fitted with seeds 0, 1
and 2 it gives three identical models, so its "seed spread" is 0 and the gap interval can
only see test-set sampling, not which training units happened to be drawn. For such a
family (``Family.has_own_randomness`` is false) the fit stage trains seed ``s`` on
:func:`resample_train(train, s) <resample_train>` instead: by default a half-sample of the
training units (or of their documents) chosen by the seed. Its seeds then vary as the seeds
of a neural family do, and ``docs/statistics.md`` ("Seeds of a deterministic family") gives
the coverage this buys, the schemes it was chosen over, and what it costs.

The sample depends only on the seed, the number of units and their document ids, never on
the tokens, so every order of a source trains seed ``s`` on the *same* units (reordered):
the orders' gaps are paired by seed, like the test units are.

A model's ``train_sample`` setting (``study.models.<name>.train_sample``) chooses:

- ``auto`` (default): ``half`` for families without randomness of their own, else ``none``;
- ``none``: every seed trains on all training units;
- ``half``: seed ``s`` trains on half of the training units, drawn without replacement
  (whole documents when the units carry the ids of at least ``MIN_DOCUMENT_GROUPS``
  documents): a real sample of the source, half the size;
- ``bootstrap``: seed ``s`` trains on ``n`` units drawn with replacement from the ``n``.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ..validation import check_choice, check_float, check_int
from ._sequences import SequenceSet

__all__ = [
    "DEFAULT_TRAIN_SAMPLE",
    "MIN_DOCUMENT_GROUPS",
    "TRAIN_SAMPLES",
    "TRAIN_SAMPLE_SCHEMES",
    "resample_train",
    "resolve_train_sample",
    "sample_index",
]

#: what ``train_sample`` may be set to in a model's config
TRAIN_SAMPLES = ("auto", "none", "half", "bootstrap")
#: how :func:`resample_train` can draw: ``(with replacement?, default fraction)``;
#: ``subsample`` needs its fraction
TRAIN_SAMPLE_SCHEMES: dict[str, tuple[bool, float | None]] = {
    "half": (False, 0.5),
    "bootstrap": (True, 1.0),
    "subsample": (False, None),
}
#: the scheme ``auto`` picks for a family without randomness of its own (chosen by
#: simulation: ``docs/statistics.md``, "Seeds of a deterministic family")
DEFAULT_TRAIN_SAMPLE = "half"
#: fewest documents that are drawn whole; with fewer (one file cut into lines is one
#: document) the units are drawn one by one, else every seed would train on the same units
#: (one document) or on one of a handful of very different halves. The stats' interval
#: groups test units by the same rule (``retrograde.stats.MIN_DOCUMENTS_FOR_GROUPING``).
MIN_DOCUMENT_GROUPS = 10
#: mixed into the seed so the sample's random stream differs from a family's own use of it
_SALT = 0x7472_6169


def resolve_train_sample(setting: str, family: Any, owner: str = "model") -> str:
    """``none`` or a scheme: what ``setting`` means for ``family`` (a Family class or instance).

    Examples
    --------
    >>> from retrograde import families
    >>> resolve_train_sample("auto", families.registry.get("ngram"))
    'half'
    >>> resolve_train_sample("auto", families.registry.get("mlp"))
    'none'
    """
    setting = check_choice(owner, "train_sample", setting, TRAIN_SAMPLES)
    if setting != "auto":
        return setting
    return "none" if getattr(family, "has_own_randomness", True) else DEFAULT_TRAIN_SAMPLE


def sample_index(
    n_units: int,
    seed: int,
    *,
    scheme: str = DEFAULT_TRAIN_SAMPLE,
    fraction: float | None = None,
    doc_ids: np.ndarray | None = None,
) -> np.ndarray:
    """(n_drawn,) sorted int64 indices of the training units seed ``seed`` trains on.

    ``half`` draws half of the groups without replacement, ``bootstrap`` as many groups as
    there are with replacement, ``subsample`` ``round(fraction * n_groups)`` without
    (``fraction`` in (0, 1]; it also overrides the other schemes' share). A group is a
    document when ``doc_ids`` name at least :data:`MIN_DOCUMENT_GROUPS` documents (all its
    units are drawn together, as often as the document is), else a unit; at least one group
    is drawn. A unit drawn twice appears twice.

    Examples
    --------
    >>> sample_index(5, 0, scheme="subsample", fraction=1.0).tolist()
    [0, 1, 2, 3, 4]
    >>> len(sample_index(6, 1)), len(sample_index(6, 1, scheme="bootstrap"))
    (3, 6)
    >>> len(sample_index(6, 1, doc_ids=np.zeros(6)))  # one document: its units are drawn
    3
    """
    owner = "train sample"
    n_units = check_int(owner, "n_units", n_units, 1)
    seed = check_int(owner, "seed", seed, 0)
    scheme = check_choice(owner, "scheme", scheme, tuple(TRAIN_SAMPLE_SCHEMES))
    replace, share = TRAIN_SAMPLE_SCHEMES[scheme]
    if fraction is not None or share is None:
        share = check_float(owner, "fraction", fraction, 0.0, 1.0, low_open=True)
    group_of_unit = np.arange(n_units, dtype=np.int64)
    if doc_ids is not None:
        _, documents = np.unique(np.asarray(doc_ids), return_inverse=True)
        if int(documents.max(initial=-1)) + 1 >= MIN_DOCUMENT_GROUPS:
            group_of_unit = documents.ravel().astype(np.int64)
    n_groups = int(group_of_unit.max()) + 1
    n_drawn = max(1, round(share * n_groups))
    rng = np.random.default_rng([seed, _SALT])
    if replace:
        groups = rng.integers(0, n_groups, size=n_drawn)
    else:
        groups = rng.choice(n_groups, size=n_drawn, replace=False)
    # Each drawn group contributes all of its units, once per draw.
    draws = np.bincount(groups, minlength=n_groups)  # (n_groups,)
    return np.repeat(np.arange(n_units, dtype=np.int64), draws[group_of_unit])


def resample_train(
    units: SequenceSet,
    seed: int,
    *,
    scheme: str = DEFAULT_TRAIN_SAMPLE,
    fraction: float | None = None,
) -> SequenceSet:
    """The training units seed ``seed`` trains on (:func:`sample_index`), vocabulary kept.

    The result keeps ``units``' vocabulary size even when the sample misses the largest
    token id, so a model fitted on it scores the same test units as one fitted on ``units``.

    Examples
    --------
    >>> train = SequenceSet.from_list([[1, 2], [3], [0, 0, 1]], vocab_size=4)
    >>> sample = resample_train(train, seed=2)
    >>> len(sample), sample.vocab_size
    (2, 4)
    >>> resample_train(train, seed=2).tokens.tolist() == sample.tokens.tolist()
    True
    """
    index = sample_index(len(units), seed, scheme=scheme, fraction=fraction, doc_ids=units.doc_ids)
    sample = units.subset(index)
    return SequenceSet(
        sample.tokens,
        sample.offsets,
        vocab_size=units.effective_vocab_size(),
        doc_ids=sample.doc_ids,
        n_bytes=sample.n_bytes,
    )
