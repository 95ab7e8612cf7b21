"""The per-partition steps of a window's graph on Dask, as plain pandas functions of one
partition: edge and pair aggregation, neighbour lists, local counts, the degree-ordered
triangle listing and the egonet features.

They compute the quantities of :class:`rolewatch.engine.features.graph.SnapshotGraph` (ReFeX
base features, Henderson et al., KDD 2011); :mod:`rolewatch.scale.graph` chains them with
shuffles so each sees every row its key account owns. Triangles are listed once each in the
degree-ordered ("forward") orientation of Schank & Wagner ("Finding, counting and listing
all triangles in large graphs", 2005), as in :mod:`rolewatch.engine.features.triangles`:
wedges ``lo -> a``, ``lo -> b`` joined on ``lo``, closed by the arc ``a -> b``.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from rolewatch.engine.features.graph import LOCAL_FEATURES

__all__ = [
    "LOCAL",
    "aggregate_edges",
    "aggregate_pairs",
    "both_ends",
    "close_wedges",
    "corners",
    "egonet_columns",
    "local_columns",
    "local_table",
    "oriented",
    "ranked",
    "sum_by_account",
    "wedges",
    "with_degree",
]

# The engine's local features but reciprocity, which follows from "both" (reciprocated pairs).
LOCAL = (*(name for name in LOCAL_FEATURES if name != "reciprocity"), "both")


def oriented(part: pd.DataFrame) -> pd.DataFrame:
    """Each ordered pair as its undirected pair ``u < v`` with the direction bit."""
    actor, target = part["actor"].to_numpy(), part["target"].to_numpy()
    forward = actor < target
    return pd.DataFrame(
        {
            "u": np.where(forward, actor, target),
            "v": np.where(forward, target, actor),
            "code": np.where(forward, 1, 2).astype(np.int64),
        }
    )


def both_ends(part: pd.DataFrame) -> pd.DataFrame:
    """Each undirected pair from both of its ends."""
    code = part["code"].to_numpy()
    forward, backward = (code & 1) > 0, (code & 2) > 0
    return pd.DataFrame(
        {
            "account": np.concatenate([part["u"].to_numpy(), part["v"].to_numpy()]),
            "other": np.concatenate([part["v"].to_numpy(), part["u"].to_numpy()]),
            "out": np.concatenate([forward, backward]).astype(np.float64),
            "in": np.concatenate([backward, forward]).astype(np.float64),
        }
    )


def _local_rows(part: pd.DataFrame, kind: str) -> pd.DataFrame:
    """Per-row contributions to :data:`LOCAL` from edges (``kind`` "out" or "in") or from
    neighbour rows (``kind`` "pairs")."""
    n = len(part)
    zero = np.zeros(n)
    columns = {name: zero for name in LOCAL}
    if kind == "pairs":
        out, into = part["out"].to_numpy(), part["in"].to_numpy()
        account = part["account"].to_numpy()
        columns = dict(columns, out_degree=out, in_degree=into, degree=np.ones(n), both=out * into)
    else:
        account = part["actor" if kind == "out" else "target"].to_numpy()
        columns = dict(
            columns,
            **{
                f"{kind}_events": part["events"].to_numpy(dtype=np.float64),
                f"{kind}_strength": part["weight"].to_numpy(dtype=np.float64),
            },
        )
    return pd.DataFrame({"account": account, **columns})


def aggregate_edges(part: pd.DataFrame) -> pd.DataFrame:
    """Events (``actor, target, weight``) of the actors this partition owns, summed per
    ordered pair: ``actor, target, events, weight``."""
    summed = (
        part.assign(events=1.0)
        .groupby(["actor", "target"], sort=False)[["events", "weight"]]
        .sum()
        .reset_index()
    )
    return summed


def aggregate_pairs(part: pd.DataFrame) -> pd.DataFrame:
    """Oriented pairs (``u, v, code``) of the ``u`` this partition owns, one row per pair."""
    return part.groupby(["u", "v"], sort=False)[["code"]].sum().reset_index()


def local_table(pairs: pd.DataFrame, sent: pd.DataFrame, received: pd.DataFrame) -> pd.DataFrame:
    """:data:`LOCAL` counts of the accounts this partition owns, from their neighbour rows,
    the edges they sent and the edges they received."""
    rows = pd.concat(
        [_local_rows(pairs, "pairs"), _local_rows(sent, "out"), _local_rows(received, "in")]
    )
    return rows.groupby("account", sort=False).sum()


def sum_by_account(part: pd.DataFrame) -> pd.DataFrame:
    """Rows of per-account contributions summed per account (the index)."""
    return part.groupby("account", sort=False).sum()


def with_degree(part: pd.DataFrame, local: pd.DataFrame, end: str) -> pd.DataFrame:
    """Pairs with the degree of their ``end`` ("u" or "v"), owned by this partition."""
    degree = local["degree"].rename(f"degree_{end}")
    return part.join(degree, on=end)


def close_wedges(part: pd.DataFrame, ranked_pairs: pd.DataFrame) -> pd.DataFrame:
    """Wedges of the ``a`` this partition owns closed by the pair ``a -> b`` (triangles)."""
    closing = ranked_pairs[["lo", "hi", "mutual"]].rename(columns={"lo": "a", "hi": "b"})
    return part.merge(closing, on=["a", "b"])


def local_columns(local: pd.DataFrame) -> pd.DataFrame:
    """The ReFeX local base features of one partition of :attr:`GraphFrames.local`."""
    degree = local["degree"].to_numpy()
    both = local["both"].to_numpy()
    reciprocity = np.divide(both, degree, out=np.zeros_like(both), where=degree > 0)
    frame = local[[name for name in LOCAL if name != "both"]].copy()
    frame["reciprocity"] = reciprocity
    return frame


def ranked(part: pd.DataFrame) -> pd.DataFrame:
    """Each pair pointed from its lower to its higher ``(degree, id)`` rank, with the
    higher end's degree and whether the pair is reciprocated."""
    du, dv = part["degree_u"].to_numpy(), part["degree_v"].to_numpy()
    u, v = part["u"].to_numpy(), part["v"].to_numpy()
    up = (du < dv) | ((du == dv) & (u < v))
    return pd.DataFrame(
        {
            "lo": np.where(up, u, v),
            "hi": np.where(up, v, u),
            "degree_hi": np.where(up, dv, du),
            "mutual": (part["code"].to_numpy() == 3).astype(np.float64),
        }
    )


def wedges(ranked_pairs: pd.DataFrame) -> pd.DataFrame:
    """Wedges ``lo -> a, lo -> b`` of the ``lo`` this partition owns, ``a`` ranked below
    ``b`` (each wedge once)."""
    part = ranked_pairs.merge(ranked_pairs, on="lo", suffixes=("_a", "_b"))
    da, db = part["degree_hi_a"].to_numpy(), part["degree_hi_b"].to_numpy()
    a, b = part["hi_a"].to_numpy(), part["hi_b"].to_numpy()
    keep = (da < db) | ((da == db) & (a < b))
    return pd.DataFrame(
        {
            "lo": part["lo"].to_numpy()[keep],
            "a": a[keep],
            "b": b[keep],
            "mutual_a": part["mutual_a"].to_numpy()[keep],
            "mutual_b": part["mutual_b"].to_numpy()[keep],
        }
    )


def corners(part: pd.DataFrame) -> pd.DataFrame:
    """Each triangle's three corners with whether the edge opposite the corner is mutual."""
    return pd.DataFrame(
        {
            "account": np.concatenate(
                [part["lo"].to_numpy(), part["a"].to_numpy(), part["b"].to_numpy()]
            ),
            "triangles": np.ones(3 * len(part)),
            "opposite_mutual": np.concatenate(
                [
                    part["mutual"].to_numpy(),
                    part["mutual_b"].to_numpy(),
                    part["mutual_a"].to_numpy(),
                ]
            ),
        }
    )


def egonet_columns(part: pd.DataFrame) -> pd.DataFrame:
    """The ReFeX egonet features of one partition holding ``degree, in_degree, out_degree,
    triangles, opposite_mutual`` and the neighbour sums ``nbr_all:degree, nbr_all:out_degree,
    nbr_all:in_degree`` (see :mod:`rolewatch.engine.features.graph`)."""
    deg, din, dout = (part[c].to_numpy() for c in ("degree", "in_degree", "out_degree"))
    tri = part["triangles"].to_numpy()
    arcs_among = tri + part["opposite_mutual"].to_numpy()
    return pd.DataFrame(
        {
            "ego_edges": deg + tri,
            "ego_boundary_edges": part["nbr_all:degree"].to_numpy() - deg - 2.0 * tri,
            "ego_arcs_within": din + dout + arcs_among,
            "ego_arcs_out": part["nbr_all:out_degree"].to_numpy() - din - arcs_among,
            "ego_arcs_in": part["nbr_all:in_degree"].to_numpy() - dout - arcs_among,
        },
        index=part.index,
    )
