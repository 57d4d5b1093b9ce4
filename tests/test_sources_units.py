"""File sources feed ``retrograde.data.prepare_units`` (the next stage) unchanged."""

import numpy as np

from retrograde import SequenceSet
from retrograde.data import prepare_units
from retrograde.data.tokenizers import make as make_tokenizer
from retrograde.sources import make


def test_demo_entries_become_document_units_with_the_same_byte_counts():
    documents = list(make("demo", size_bytes=30_000, seed=1).documents())
    prepared = prepare_units(documents, tokenizer=make_tokenizer("chars"), mode="document")
    splits = prepared.splits.values()
    assert sum(len(s) for s in splits) + prepared.duplicates == len(documents)
    # every entry is unique (ticket numbers), so the bytes the units stage counts are the
    # bytes the source reported
    assert prepared.duplicates == 0
    assert sum(int(s.n_bytes.sum()) for s in splits) == sum(d.n_bytes for d in documents)


def test_text_paragraphs_cut_into_line_units_share_their_paragraph_doc_id(tmp_path):
    (tmp_path / "a.txt").write_text("l1\nl2\nl3\n\nm1\nm2\n")
    source = make("text", files=str(tmp_path / "a.txt"), split="paragraph")
    prepared = prepare_units(source.documents(), tokenizer=make_tokenizer("chars"), mode="line")
    doc_ids = np.concatenate([s.doc_ids for s in prepared.splits.values()])
    assert sorted(doc_ids.tolist()) == [0, 0, 0, 1, 1]


def test_token_documents_keep_their_ids(tmp_path):
    SequenceSet.from_list([[5, 1, 2], [3, 3]], vocab_size=6).save(tmp_path / "set")
    prepared = prepare_units(
        make("tokens", files=str(tmp_path / "set")).documents(),
        tokenizer=None,
        mode="document",
    )
    units = [tuple(unit.tolist()) for s in prepared.splits.values() for unit in s]
    assert sorted(units) == [(3, 3), (5, 1, 2)]
