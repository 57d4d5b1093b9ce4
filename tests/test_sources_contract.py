"""Every registered source, found by discovery, follows its contract (file or calibration)."""

import doctest
import importlib
import json
import pkgutil

import numpy as np
import pytest

import retrograde.sources
from retrograde import SequenceSet
from retrograde.data import Document
from retrograde.errors import ConfigError
from retrograde.sources import CalibrationSource, FileSource, make, names, registry


def _file_samples(folder):
    """Parameters that build each file source on small sample files in ``folder``."""
    (folder / "a.txt").write_text("one line\nsecond line\n\nnext paragraph\n")
    (folder / "a.jsonl").write_text('{"text": "x y"}\n{"text": "z"}\n')
    (folder / "r.jsonl").write_text('{"a": "x", "b": 1}\n{"a": "z", "b": 2.5}\n')
    (folder / "a.fa").write_text(">r1\nACGT\nAC\n>r2\nGG\n")
    SequenceSet.from_list([[1, 2], [3]], vocab_size=4).save(folder / "set")
    return {
        "text": {"files": str(folder / "a.txt")},
        "jsonl": {"files": str(folder / "a.jsonl")},
        "records": {"files": str(folder / "r.jsonl"), "fields": ["a", "b"]},
        "fasta": {"files": str(folder / "a.fa")},
        "tokens": {"files": str(folder / "set")},
        "demo": {"size_bytes": 5_000},
    }


def test_the_registry_holds_every_built_in_source():
    expected = {"text", "jsonl", "fasta", "tokens", "demo", "markov", "linear_gf2", "automaton"}
    assert expected <= set(names())


def test_an_unknown_source_name_suggests_the_closest():
    with pytest.raises(ConfigError, match="unknown source 'markof' \\(did you mean 'markov'\\?\\)"):
        make("markof")


@pytest.mark.parametrize("name", names())
def test_every_source_follows_its_contract(name, tmp_path):
    factory = registry.get(name)
    if issubclass(factory, CalibrationSource):
        _check_calibration(make(name))
    else:
        samples = _file_samples(tmp_path)
        assert name in samples, f"add sample parameters for file source {name!r} to this test"
        _check_file_source(make(name, **samples[name]))


def _check_calibration(source):
    assert source.is_calibration
    units = source.generate(7, seed=1)
    assert isinstance(units, SequenceSet)
    assert np.array_equal(units.tokens, source.generate(7, seed=1).tokens)  # deterministic
    assert units.vocab_size == source.vocab_size
    assert units.lengths.tolist() == [source.unit_length] * 7
    assert units.doc_ids.tolist() == list(range(7))
    assert units.tokens.min() >= 0 and units.tokens.max() < source.vocab_size
    floors = source.nll(units)
    assert floors.shape == (7,) and floors.dtype == np.float64
    assert np.all(np.isfinite(floors)) and np.all(floors > 0)
    # spans tile the unit in natural order
    spans = source.spans(source.unit_length)
    bounds = sorted(spans.values())
    assert bounds[0][0] == 0 and bounds[-1][1] == source.unit_length
    assert all(a[1] == b[0] for a, b in zip(bounds, bounds[1:], strict=False))
    metadata = source.metadata()
    assert json.loads(json.dumps(metadata, allow_nan=False)) == metadata
    # the parameters rebuild the same truth
    rebuilt = make(source.name, **source.get_params())
    assert np.array_equal(rebuilt.nll(units), floors)
    assert len(source.generate(0, seed=0)) == 0
    with pytest.raises(ConfigError, match="parameter n_units=-1 is invalid"):
        source.generate(-1, seed=0)


def _check_file_source(source):
    assert not source.is_calibration
    assert all(path.exists() for path in source.paths())
    documents = list(source.documents())
    assert documents and all(isinstance(d, Document) for d in documents)
    assert [d.doc_id for d in documents] == list(range(len(documents)))
    assert all(d.where for d in documents)
    for document in documents:
        if document.text is not None:
            assert document.n_bytes == len(document.text.encode("utf-8"))
    again = list(type(source)(**source.get_params()).documents())
    assert [(d.where, d.text, None if d.tokens is None else d.tokens.tolist()) for d in again] == [
        (d.where, d.text, None if d.tokens is None else d.tokens.tolist()) for d in documents
    ]


def _source_modules():
    package = retrograde.sources
    for info in pkgutil.walk_packages(package.__path__, package.__name__ + "."):
        if not info.name.endswith("__main__"):
            yield importlib.import_module(info.name)


@pytest.mark.parametrize("module", list(_source_modules()), ids=lambda m: m.__name__)
def test_docstring_examples_run(module):
    result = doctest.testmod(module, optionflags=doctest.ELLIPSIS)
    assert result.failed == 0


def test_base_classes_are_the_documented_contracts():
    assert issubclass(registry.get("text"), FileSource)
    assert issubclass(registry.get("automaton"), CalibrationSource)
