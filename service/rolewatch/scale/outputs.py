"""Per-window memberships and scores as a Parquet dataset partitioned by window.

Layout::

    OUTPUTS/window_end_us=1768435200000000/memberships.parquet

One file per window, rows sorted by account and written in row groups with min/max
statistics, so reading one account's history touches one row group per window (predicate
pushdown). Columns: ``account`` (string), ``status`` (string), ``dominant_role`` (int64, -1
when none), ``score`` (float64, null when unscored), ``events_out``, ``events_in`` (int64),
``basis_version`` (string) and ``mixture`` (map from role id to share; empty when the
account had too little activity). A window written again (a retried close) replaces its file.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.fs
import pyarrow.parquet as pq

__all__ = [
    "OUTPUT_SCHEMA",
    "WindowOutputs",
    "account_history",
    "open_outputs",
    "write_window_outputs",
]

PARTITION = "window_end_us"
# Small row groups: one account's read decodes one group per window (1,024 rows; 16,384
# made the 52-window history read 5-10 times slower in rolewatch bench archive-history-52).
ROW_GROUP = 1_024
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
    ]
)
_PARTITIONING = ds.partitioning(pa.schema([(PARTITION, pa.int64())]), flavor="hive")


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


def _mixtures(outputs: WindowOutputs) -> pa.Array:
    k = len(outputs.role_ids)
    mixture = np.asarray(outputs.mixture, dtype=np.float64).reshape(-1, k)
    fitted = np.isfinite(mixture).all(axis=1)
    lengths = np.where(fitted, k, 0)
    offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int32)
    keys = np.tile(np.asarray(outputs.role_ids, dtype=np.int64), int(fitted.sum()))
    return pa.MapArray.from_arrays(
        pa.array(offsets), pa.array(keys), pa.array(mixture[fitted].ravel())
    )


def write_window_outputs(path: str, window_end_us: int, outputs: WindowOutputs) -> int:
    """Write (or replace) one window's file; return the rows written."""
    order = np.argsort(np.asarray(outputs.accounts, dtype=str), kind="stable")
    score = np.asarray(outputs.score, dtype=np.float64)[order]
    table = pa.table(
        {
            "account": pa.array(np.asarray(outputs.accounts, dtype=str)[order], pa.string()),
            "status": pa.array(np.asarray(outputs.status, dtype=str)[order], pa.string()),
            "dominant_role": pa.array(np.asarray(outputs.dominant, dtype=np.int64)[order]),
            "score": pa.array(score, pa.float64(), mask=~np.isfinite(score)),
            "events_out": pa.array(np.asarray(outputs.events_out, dtype=np.int64)[order]),
            "events_in": pa.array(np.asarray(outputs.events_in, dtype=np.int64)[order]),
            "basis_version": pa.array([outputs.basis_version] * len(order), pa.string()),
            "mixture": _mixtures(outputs).take(pa.array(order)),
        },
        schema=OUTPUT_SCHEMA,
    )
    folder = f"{path.rstrip('/')}/{PARTITION}={int(window_end_us)}"
    filesystem, root = pa.fs.FileSystem.from_uri(folder) if "://" in folder else (None, folder)
    if filesystem is None:
        filesystem = pa.fs.LocalFileSystem()
    filesystem.create_dir(root, recursive=True)
    pq.write_table(
        table,
        f"{root}/memberships.parquet",
        filesystem=filesystem,
        row_group_size=ROW_GROUP,
        write_statistics=True,
    )
    return table.num_rows


def open_outputs(path: str) -> ds.Dataset:
    """The outputs as a dataset with every file's footer read once, so later history reads
    prune row groups from memory (open it again to see windows written since)."""
    dataset = ds.dataset(path, format="parquet", partitioning=_PARTITIONING)
    for fragment in dataset.get_fragments():
        fragment.ensure_complete_metadata()
    return dataset


def account_history(
    outputs: str | ds.Dataset, account: str, *, limit: int = 52
) -> list[dict[str, Any]]:
    """One account's measures in its last ``limit`` archived windows, newest first
    (``outputs``: a path, or a dataset from :func:`open_outputs`)."""
    dataset = open_outputs(outputs) if isinstance(outputs, str) else outputs
    table = dataset.to_table(filter=ds.field("account") == account, use_threads=False)
    rows = sorted(table.to_pylist(), key=lambda row: row[PARTITION], reverse=True)[:limit]
    for row in rows:
        row["mixture"] = {str(role): share for role, share in row["mixture"] or []}
    return rows
