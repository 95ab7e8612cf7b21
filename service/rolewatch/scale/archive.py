"""The Parquet event archive: raw events as a pyarrow dataset partitioned by window.

Layout (docs/scale.md has the full description for teams that write it themselves)::

    ARCHIVE/window_end_us=1767830400000000/part-<uuid>-0.parquet

Columns: ``id`` (string), ``time`` (timestamp, microseconds, UTC; a plain int64 of
microseconds since the Unix epoch is read the same way), ``actor``, ``target``, ``kind``
(strings, ``kind`` may be null) and ``weight`` (float64). The hive partition
``window_end_us`` is the end, in microseconds since the epoch, of the ``window_period`` slot
holding the event (``(time // period + 1) * period``); a window whose span covers several
periods reads several slots. An ``id`` seen twice is read once: its earliest row, and at equal
times the row of the file whose path sorts first (the dataset's order).
"""

from __future__ import annotations

import uuid
from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.dataset as ds

__all__ = [
    "COLUMNS",
    "PARTITION",
    "SCHEMA",
    "ArchiveMissing",
    "ArchiveSpan",
    "archive_span",
    "events_table",
    "first_time_from",
    "open_archive",
    "read_window",
    "window_paths",
    "write_events",
]

PARTITION = "window_end_us"
SCHEMA = pa.schema(
    [
        ("id", pa.string()),
        ("time", pa.timestamp("us", tz="UTC")),
        ("actor", pa.string()),
        ("target", pa.string()),
        ("kind", pa.string()),
        ("weight", pa.float64()),
    ]
)
COLUMNS = tuple(SCHEMA.names)
_PARTITIONING = ds.partitioning(pa.schema([(PARTITION, pa.int64())]), flavor="hive")


class ArchiveMissing(Exception):
    """The archive named by ``event_archive`` does not exist or holds no events."""


@dataclass(frozen=True)
class ArchiveSpan:
    """Earliest and latest event time in the archive (microseconds)."""

    min_us: int
    max_us: int


def events_table(
    event_id: Iterable[str],
    time_us: Iterable[int],
    actor: Iterable[str],
    target: Iterable[str],
    kind: Iterable[str | None],
    weight: Iterable[float],
) -> pa.Table:
    """Parallel event columns as a table of the archive's schema."""
    return pa.table(
        {
            "id": pa.array(list(event_id), pa.string()),
            "time": pa.array(np.asarray(list(time_us), dtype=np.int64), pa.int64()).cast(
                SCHEMA.field("time").type
            ),
            "actor": pa.array(list(actor), pa.string()),
            "target": pa.array(list(target), pa.string()),
            "kind": pa.array(list(kind), pa.string()),
            "weight": pa.array(np.asarray(list(weight), dtype=np.float64), pa.float64()),
        },
        schema=SCHEMA,
    )


def _micros(column: pa.ChunkedArray | pa.Array) -> np.ndarray:
    """Event times as int64 microseconds whether stored as timestamps or integers."""
    if pa.types.is_timestamp(column.type):
        column = column.cast(pa.timestamp("us", tz="UTC")).cast(pa.int64())
    return np.asarray(column.to_numpy(zero_copy_only=False), dtype=np.int64)


def write_events(
    archive: str, table: pa.Table, period_us: int, rows_per_group: int | None = None
) -> int:
    """Append ``table`` (the archive's columns) to the archive; return the rows written.

    Each call writes new files (a fresh name per call), so earlier files are never
    overwritten: appending the same events twice stores them twice, and reading keeps one.
    ``rows_per_group`` caps a Parquet row group's rows (None: pyarrow's default).
    """
    if table.num_rows == 0:
        return 0
    table = table.select(list(COLUMNS)).cast(SCHEMA)
    slot = (_micros(table.column("time")) // period_us + 1) * period_us
    table = table.append_column(PARTITION, pa.array(slot, pa.int64()))
    ds.write_dataset(
        table,
        archive,
        format="parquet",
        partitioning=_PARTITIONING,
        basename_template=f"part-{uuid.uuid4().hex}-{{i}}.parquet",
        existing_data_behavior="overwrite_or_ignore",
        **(
            {}
            if rows_per_group is None
            else {"max_rows_per_group": rows_per_group, "min_rows_per_group": 0}
        ),
    )
    return table.num_rows


def open_archive(archive: str) -> ds.Dataset:
    """The archive as a pyarrow dataset (local path or any URL pyarrow opens)."""
    try:
        return ds.dataset(archive, format="parquet", partitioning=_PARTITIONING)
    except (FileNotFoundError, OSError) as error:
        raise ArchiveMissing(
            f"cannot open the event archive {archive!r} ({error}); write one with "
            "`rolewatch replay FILE --to-archive` or point event_archive at an existing one"
        ) from None


def _time_scalar(dataset: ds.Dataset, time_us: int) -> pa.Scalar:
    kind = dataset.schema.field("time").type
    if pa.types.is_timestamp(kind):
        return pa.scalar(time_us, pa.int64()).cast(kind)
    return pa.scalar(time_us, kind)


def _slots(dataset: ds.Dataset) -> np.ndarray:
    """Partition values of the archive's files, sorted, without repeats."""
    values = [
        ds.get_partition_keys(fragment.partition_expression).get(PARTITION)
        for fragment in dataset.get_fragments()
    ]
    return np.unique(np.asarray([v for v in values if v is not None], dtype=np.int64))


def window_paths(archive: str, start_us: int, end_us: int) -> list[str]:
    """The files that may hold events of ``[start_us, end_us)`` (for readers that are not
    pyarrow, like dask.dataframe.read_parquet)."""
    dataset = open_archive(archive)
    return [
        fragment.path for fragment in dataset.get_fragments(filter=_slot_filter(start_us, end_us))
    ]


def _slot_filter(start_us: int, end_us: int) -> ds.Expression:
    return (ds.field(PARTITION) > start_us) & (ds.field(PARTITION) <= end_us)


def read_window(archive: str, start_us: int, end_us: int) -> pa.Table:
    """The archived events with ``start_us <= time < end_us``, sorted by (time, id), each id
    once; ``time`` as int64 microseconds."""
    dataset = open_archive(archive)
    time = ds.field("time")
    table = dataset.to_table(
        columns=["id", "time", "actor", "target", "weight"],
        filter=_slot_filter(start_us, end_us)
        & (time >= _time_scalar(dataset, start_us))
        & (time < _time_scalar(dataset, end_us)),
    )
    table = table.set_column(1, "time", pa.array(_micros(table.column("time")), pa.int64()))
    table = table.sort_by([("time", "ascending"), ("id", "ascending")])
    # each id's first row: ids coded by Arrow, so no Python string per event is made
    ids = table.column("id").combine_chunks().dictionary_encode().indices.to_numpy()
    _, first = np.unique(ids, return_index=True)
    if len(first) < table.num_rows:
        table = table.take(pa.array(np.sort(first)))
    return table


def archive_span(archive: str) -> ArchiveSpan | None:
    """Earliest and latest event time, reading only the first and last slots' times; None
    when the archive holds no event."""
    dataset = open_archive(archive)
    slots = _slots(dataset)
    if slots.size == 0:
        return None
    low = _micros(
        dataset.to_table(columns=["time"], filter=ds.field(PARTITION) == int(slots[0])).column(
            "time"
        )
    )
    high = _micros(
        dataset.to_table(columns=["time"], filter=ds.field(PARTITION) == int(slots[-1])).column(
            "time"
        )
    )
    if low.size == 0 or high.size == 0:
        return None
    return ArchiveSpan(min_us=int(low.min()), max_us=int(high.max()))


def first_time_from(archive: str, start_us: int) -> int | None:
    """The earliest archived event time at or after ``start_us``, or None."""
    dataset = open_archive(archive)
    for slot in _slots(dataset):
        if slot <= start_us:
            continue
        times = dataset.to_table(
            columns=["time"],
            filter=(ds.field(PARTITION) == int(slot))
            & (ds.field("time") >= _time_scalar(dataset, start_us)),
        ).column("time")
        if len(times):
            return int(pc.min(pa.array(_micros(times), pa.int64())).as_py())
    return None
