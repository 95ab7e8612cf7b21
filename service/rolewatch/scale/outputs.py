"""Per-window memberships and scores as a Parquet dataset partitioned by window.

Layout::

    OUTPUTS/window_end_us=1768435200000000/memberships.parquet
    OUTPUTS/window_end_us=1768435200000000/pairs.parquet

One memberships file per window (its first-seen pairs beside it:
:mod:`rolewatch.scale.pair_outputs`), rows sorted by account and written in row groups with
min/max statistics, so reading one account's history touches one row group per window
(:mod:`rolewatch.scale.output_reads`). Columns: ``account`` (string), ``status`` (string),
``dominant_role`` (int64, -1 when none), ``score`` (float64, null when unscored),
``events_out``, ``events_in`` (int64), ``basis_version`` (string), ``mixture`` (map from role
id to share; empty when the account had too little activity), ``counterparts``,
``new_counterparts`` (int64), ``error`` (float64), the four tie cells ``ties_out_known``,
``ties_out_new``, ``ties_in_known``, ``ties_in_new`` (int64, null where unknown) and
``community`` (int64, null where none): every column the store's memberships hold, so a
window whose memberships are kept only here reads back as the store would give it. A window
written again (a retried close) replaces its file.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.fs
import pyarrow.parquet as pq

__all__ = [
    "MEMBERSHIPS_FILE",
    "OUTPUT_SCHEMA",
    "PARTITION",
    "TIE_COLUMNS",
    "WindowOutputs",
    "window_file",
    "write_window_outputs",
]

PARTITION = "window_end_us"
MEMBERSHIPS_FILE = "memberships.parquet"
# Small row groups: one account's read decodes one group per window (1,024 rows; 16,384
# made the 52-window history read 5-10 times slower in rolewatch bench archive-history-52).
ROW_GROUP = 1_024
TIE_COLUMNS = ("ties_out_known", "ties_out_new", "ties_in_known", "ties_in_new")
OUTPUT_SCHEMA = pa.schema(
    [
        ("account", pa.string()),
        ("status", pa.string()),
        ("dominant_role", pa.int64()),
        ("score", pa.float64()),
        ("events_out", pa.int64()),
        ("events_in", pa.int64()),
        ("basis_version", pa.string()),
        ("mixture", pa.map_(pa.int64(), pa.float64())),
        ("counterparts", pa.int64()),
        ("new_counterparts", pa.int64()),
        ("error", pa.float64()),
        *((name, pa.int64()) for name in TIE_COLUMNS),
        ("community", pa.int64()),
    ]
)


@dataclass(frozen=True)
class WindowOutputs:
    """One window's per-account measures, in any account order."""

    accounts: np.ndarray
    role_ids: tuple[int, ...]
    mixture: np.ndarray  # n x k, NaN rows where no role was fitted
    dominant: np.ndarray
    score: np.ndarray
    status: np.ndarray
    events_out: np.ndarray
    events_in: np.ndarray
    basis_version: str
    counterparts: np.ndarray | None = None
    new_counterparts: np.ndarray | None = None
    error: np.ndarray | None = None
    ties: np.ndarray | None = None  # n x 4 (engine.ties.TIE_CELLS), negative where unknown
    community: np.ndarray | None = None  # n, -1 where none


def _mixtures(outputs: WindowOutputs) -> pa.Array:
    k = len(outputs.role_ids)
    mixture = np.asarray(outputs.mixture, dtype=np.float64).reshape(-1, k)
    fitted = np.isfinite(mixture).all(axis=1) & (np.asarray(outputs.status) != "too_little")
    lengths = np.where(fitted, k, 0)
    offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int32)
    keys = np.tile(np.asarray(outputs.role_ids, dtype=np.int64), int(fitted.sum()))
    return pa.MapArray.from_arrays(
        pa.array(offsets), pa.array(keys), pa.array(mixture[fitted].ravel())
    )


def _integers(values: np.ndarray | None, order: np.ndarray, *, negative_is_null: bool) -> pa.Array:
    """An int64 column in ``order``; null where absent (and where negative, if asked)."""
    if values is None:
        return pa.nulls(len(order), pa.int64())
    column = np.asarray(values, dtype=np.int64)[order]
    return pa.array(column, pa.int64(), mask=column < 0 if negative_is_null else None)


def _floats(values: np.ndarray | None, order: np.ndarray) -> pa.Array:
    """A float64 column in ``order``; null where absent or not finite."""
    if values is None:
        return pa.nulls(len(order), pa.float64())
    column = np.asarray(values, dtype=np.float64)[order]
    return pa.array(column, pa.float64(), mask=~np.isfinite(column))


def _table(outputs: WindowOutputs) -> pa.Table:
    """The window's rows sorted by account, in :data:`OUTPUT_SCHEMA`."""
    # sorted by Arrow (code point order, as numpy sorts text) without numpy's fixed-width
    # text, which takes 4 bytes a character of the longest id for every id
    accounts = pa.array(np.asarray(outputs.accounts, dtype=object), pa.string())
    order = pc.sort_indices(accounts).to_numpy()
    ties = np.full((len(order), 4), -1) if outputs.ties is None else np.asarray(outputs.ties)
    return pa.table(
        {
            "account": accounts.take(pa.array(order)),
            "status": pa.array(np.asarray(outputs.status, dtype=str)[order], pa.string()),
            "dominant_role": pa.array(np.asarray(outputs.dominant, dtype=np.int64)[order]),
            "score": _floats(outputs.score, order),
            "events_out": pa.array(np.asarray(outputs.events_out, dtype=np.int64)[order]),
            "events_in": pa.array(np.asarray(outputs.events_in, dtype=np.int64)[order]),
            "basis_version": pa.array([outputs.basis_version] * len(order), pa.string()),
            "mixture": _mixtures(outputs).take(pa.array(order)),
            "counterparts": _integers(outputs.counterparts, order, negative_is_null=False),
            "new_counterparts": _integers(outputs.new_counterparts, order, negative_is_null=False),
            "error": _floats(outputs.error, order),
            **{
                name: _integers(ties[:, cell], order, negative_is_null=True)
                for cell, name in enumerate(TIE_COLUMNS)
            },
            "community": _integers(outputs.community, order, negative_is_null=True),
        },
        schema=OUTPUT_SCHEMA,
    )


def window_file(
    path: str, window_end_us: int, name: str = MEMBERSHIPS_FILE
) -> tuple[pa.fs.FileSystem, str]:
    """The filesystem holding ``path`` and the path of one window's file ``name`` (its
    memberships by default) within it."""
    folder = f"{path.rstrip('/')}/{PARTITION}={int(window_end_us)}"
    if "://" in folder:
        filesystem, root = pa.fs.FileSystem.from_uri(folder)
        return filesystem, f"{root}/{name}"
    return pa.fs.LocalFileSystem(), f"{folder}/{name}"


def write_window_outputs(path: str, window_end_us: int, outputs: WindowOutputs) -> int:
    """Write (or replace) one window's file; return the rows written."""
    table = _table(outputs)
    filesystem, file = window_file(path, window_end_us)
    filesystem.create_dir(file.rsplit("/", 1)[0], recursive=True)
    pq.write_table(
        table,
        file,
        filesystem=filesystem,
        row_group_size=ROW_GROUP,
        write_statistics=True,
    )
    return table.num_rows
