"""SequenceSet and Ragged: construction, indexing, folder format."""

import json

import numpy as np
import pytest

from retrograde import Ragged, SequenceSet
from retrograde.errors import DataError


def test_from_list_indexes_rows_in_order():
    s = SequenceSet.from_list([[1, 2, 3], [], [4]], vocab_size=5)
    assert len(s) == 3
    assert s[0].tolist() == [1, 2, 3]
    assert s[1].tolist() == []
    assert s[-1].tolist() == [4]
    assert s.lengths.tolist() == [3, 0, 1]
    assert s.offsets.tolist() == [0, 3, 3, 4]


def test_token_ids_outside_vocabulary_are_refused():
    with pytest.raises(ValueError, match="token ids"):
        SequenceSet.from_list([[1, 7]], vocab_size=5)


def test_save_load_round_trip_with_metadata_and_mmap(tmp_path):
    s = SequenceSet.from_list([[1, 2], [3, 4, 0]], vocab_size=5, doc_ids=[0, 0], n_bytes=[2, 3])
    s.save(tmp_path / "set")
    meta = json.loads((tmp_path / "set" / "meta.json").read_text())
    assert meta == {
        "format": "retrograde.sequences/1",
        "vocab_size": 5,
        "n_units": 2,
        "n_tokens": 5,
    }
    loaded = SequenceSet.load(tmp_path / "set", mmap=True)
    assert not loaded.tokens.flags.owndata  # a view of the memory map, not a copy
    assert [u.tolist() for u in loaded] == [[1, 2], [3, 4, 0]]
    assert loaded.doc_ids.tolist() == [0, 0] and loaded.n_bytes.tolist() == [2, 3]
    assert loaded.vocab_size == 5


def test_load_of_a_folder_without_meta_is_a_data_error(tmp_path):
    with pytest.raises(DataError, match="meta.json"):
        SequenceSet.load(tmp_path)


def test_subset_keeps_metadata():
    s = SequenceSet.from_list([[1], [2, 2], [3, 3, 3]], vocab_size=4, doc_ids=[7, 8, 9])
    sub = s.subset(np.array([2, 0]))
    assert [u.tolist() for u in sub] == [[3, 3, 3], [1]]
    assert sub.doc_ids.tolist() == [9, 7]


def test_ragged_sums_positions_and_row_ids():
    r = Ragged.from_list([[1.0, 2.0], [], [3.0]])
    assert r.sums().tolist() == [3.0, 0.0, 3.0]
    assert r.positions().tolist() == [0, 1, 0]
    assert r.row_ids().tolist() == [0, 0, 2]


def test_write_npz_is_byte_identical_and_loads_without_pickle(tmp_path):
    from retrograde.data import write_npz

    arrays = {"b": np.arange(3), "a": np.ones((2, 2))}
    write_npz(tmp_path / "one.npz", arrays)
    write_npz(tmp_path / "two.npz", dict(reversed(list(arrays.items()))))
    assert (tmp_path / "one.npz").read_bytes() == (tmp_path / "two.npz").read_bytes()
    with np.load(tmp_path / "one.npz", allow_pickle=False) as data:
        assert sorted(data.files) == ["a", "b"] and data["b"].tolist() == [0, 1, 2]


def test_atomic_writes_give_ordinary_permissions(tmp_path):
    import os
    import stat

    from retrograde.data import atomic_dir, atomic_write_text

    mask = os.umask(0o022)
    try:
        atomic_write_text(tmp_path / "a.txt", "x")
        with atomic_dir(tmp_path / "d"):
            pass
    finally:
        os.umask(mask)
    assert stat.S_IMODE((tmp_path / "a.txt").stat().st_mode) == 0o644
    assert stat.S_IMODE((tmp_path / "d").stat().st_mode) == 0o755


def test_token_ids_that_do_not_fit_int32_are_refused_not_wrapped():
    # An int64 row holding 2**32 + 5 would wrap to 5 in a plain int32 cast.
    with pytest.raises(ValueError, match="token ids"):
        SequenceSet.from_list([np.array([1, 2**32 + 5], dtype=np.int64)])
    with pytest.raises(ValueError, match="token ids"):
        SequenceSet(np.array([2**31], dtype=np.int64), np.array([0, 1]))
    with pytest.raises(ValueError, match="vocab_size"):
        SequenceSet.from_list([[1]], vocab_size=2**31)


def test_a_vocabulary_of_two_to_the_24_ids_round_trips_through_the_folder_format(tmp_path):
    top = (1 << 24) - 1
    s = SequenceSet.from_list([[top, 0, top - 1]], vocab_size=1 << 24)
    s.save(tmp_path / "set")
    assert SequenceSet.load(tmp_path / "set")[0].tolist() == [top, 0, top - 1]


def test_row_sums_do_not_lose_precision_after_a_large_running_total():
    # A running-total difference gives (1e15 + 0.1 + 0.2) - 1e15 = 0.25; each row summed on
    # its own gives 0.1 + 0.2 exactly as Python does (math.fsum rounds to the same double).
    rows = Ragged.from_list([[1e15], [], [0.1, 0.2]])
    assert rows.sums().tolist() == [1e15, 0.0, 0.1 + 0.2]
