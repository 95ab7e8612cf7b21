"""Event ids in either form (object array or Arrow string array) read and reorder the same
way, checked against Python's own list indexing and sorted() (the reference: code-point
order, as SQLite compares UTF-8 text)."""

from __future__ import annotations

import numpy as np
import pyarrow as pa

from rolewatch.store.event_ids import as_event_ids, ids_at, reordered

IDS = ["e-10", "e-9", "évé", "E-1", "e-1", "z", "", "e-10b", "😀-1", "e-2"]


def _forms():
    return {
        "object": np.array(IDS, dtype=object),
        "arrow": pa.array(IDS, pa.string()),
        "chunked": pa.chunked_array([IDS[:4], IDS[4:]], pa.string()),
    }


def test_both_forms_reorder_and_read_like_a_python_list():
    order = np.random.default_rng(3).permutation(len(IDS))
    for name, ids in _forms().items():
        moved = reordered(ids, order)
        assert [str(i) for i in moved] == [IDS[k] for k in order], name
        assert len(moved) == len(IDS)
        assert str(moved[2]) == IDS[order[2]], name


def test_ids_at_sort_by_code_point_like_python():
    rows = np.array([0, 1, 2, 3, 4, 5, 6, 7, 8, 9])
    for name, ids in _forms().items():
        at = ids_at(as_event_ids(ids), rows)
        assert [IDS[k] for k in np.argsort(at, kind="stable")] == sorted(IDS), name


def test_arrow_stays_arrow_and_anything_else_becomes_objects():
    assert isinstance(as_event_ids(pa.chunked_array([["a"], ["b"]])), pa.Array)
    plain = as_event_ids(["a", "b"])
    assert isinstance(plain, np.ndarray) and plain.dtype == object


def test_ids_kept_on_disk_read_like_a_python_list_and_leave_no_file(tmp_path):
    # The reference is Python's own list of the ids; Arrow's memory pool accounts for every
    # buffer it allocates, so a mapped array adds nothing to it.
    import gc

    from rolewatch.store.event_ids import kept_on_disk

    many = [f"e-{i}" for i in range(50_000)] + IDS
    for name, ids in {**_forms(), "many": pa.array(many, pa.string())}.items():
        expected = [str(i) for i in ids]
        gc.collect()
        before = pa.total_allocated_bytes()
        kept = kept_on_disk(ids, str(tmp_path))
        assert pa.total_allocated_bytes() == before, name  # no copy in this process's heap
        assert list(tmp_path.iterdir()) == [], name  # the file is unlinked once mapped
        del ids
        gc.collect()
        assert kept.to_pylist() == expected, name
        assert str(kept[len(expected) - 1]) == expected[-1]
        assert [str(i) for i in ids_at(kept, np.array([0, len(expected) - 1]))] == [
            expected[0],
            expected[-1],
        ]
