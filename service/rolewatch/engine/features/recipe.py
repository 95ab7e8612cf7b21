"""The frozen ReFeX feature recipe and the feature tables it produces.

:meth:`FeatureRecipe.discover` runs ReFeX (Henderson et al., "It's who you know: graph
mining using recursive structural features", KDD 2011) on reference snapshots and freezes
the outcome (kept features and bin edges), so that :meth:`FeatureRecipe.transform`
produces exactly the same columns, binned on the same scale, for every later window. A
recipe is a frozen dataclass with a JSON form whose short sha256 is its version.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np

from ..snapshot import Snapshot
from .binning import apply_bins, bin_dtype, bin_edges
from .definitions import FeatureDef, compute_features, parse_feature
from .discovery import GraphColumns, ReferenceColumns, discover_features
from .graph import SnapshotGraph
from .parameters import check_binning, check_parameters

__all__ = ["FeatureRecipe", "FeatureTable"]

FORMAT = "rolewatch.feature-recipe"
FORMAT_VERSION = 1


class RawRows(Protocol):
    """Feature values or bins held elsewhere, read by rows like an n x f array:
    ``values[rows]`` (an integer or an integer array) gives those rows as an array."""

    shape: tuple[int, int]

    @property
    def nbytes(self) -> int: ...

    def __getitem__(self, rows: Any) -> np.ndarray: ...


@dataclass(frozen=True)
class FeatureTable:
    """ReFeX features of one snapshot, computed by a :class:`FeatureRecipe`.

    Attributes
    ----------
    nodes : numpy.ndarray
        Account ids, same order as the snapshot.
    names : tuple of str
        Column names, the recipe's features in order.
    raw : numpy.ndarray
        n x f float64 unbinned values (shown as evidence). A window measured on a cluster
        may instead hold an object read by rows like an array (``raw[rows]``), whose
        values stay where they were computed.
    binned : numpy.ndarray
        n x f vertical logarithmic bin indices (Henderson et al., KDD 2011), the matrix
        RolX factorises; an unsigned integer dtype (``uint8`` unless a feature has more
        than 256 bins), eight times smaller than float64, so windows of a million events
        stay cheap to transform and to keep. A large window measured on a cluster holds
        its bins where they were computed, like its raw values (its memberships were
        fitted there).
    recipe_version : str
    triangles : numpy.ndarray or None
        Triangles through each node of the undirected view, float64, when the recipe's
        egonet features counted them (None otherwise): the readable measures reuse them
        instead of counting again.
    """

    nodes: np.ndarray
    names: tuple[str, ...]
    raw: np.ndarray | RawRows
    binned: np.ndarray | RawRows
    recipe_version: str
    triangles: np.ndarray | None = None

    def column(self, name: str, *, binned: bool = False) -> np.ndarray:
        """One feature column by name.

        Parameters
        ----------
        name : str
        binned : bool
            The bin indices instead of the raw values.

        Returns
        -------
        numpy.ndarray
            A view of length n.

        Raises
        ------
        KeyError
            ``name`` is not a feature of this table's recipe.
        """
        if name not in self.names:
            raise KeyError(f"feature {name!r} is not in this table (recipe {self.recipe_version})")
        j = self.names.index(name)
        return (self.binned if binned else self.raw)[:, j]

    def take(self, rows: np.ndarray) -> FeatureTable:
        """The table of ``rows`` only (positions, ascending), e.g. a training sample."""
        return FeatureTable(
            nodes=self.nodes[rows],
            names=self.names,
            raw=np.asarray(self.raw[rows]),
            binned=self.binned[rows],
            recipe_version=self.recipe_version,
            triangles=None if self.triangles is None else self.triangles[rows],
        )


@dataclass(frozen=True, eq=False, repr=False, kw_only=True)
class FeatureRecipe:
    """Frozen ReFeX feature set and binning learnt on reference snapshots.

    Build with :meth:`discover` (Henderson et al., KDD 2011) or :meth:`from_dict`; apply
    with :meth:`transform`. The recipe is immutable, JSON-serialisable and versioned by a
    short sha256 of its canonical JSON body.

    Attributes
    ----------
    features : tuple of FeatureDef
        Kept features in generation order (base first, then round by round).
    feature_edges : tuple of numpy.ndarray
        Frozen bin edges of each feature on the reference rows (read-only arrays).
    bin_fraction : float
        ``p`` of vertical logarithmic binning, in (0, 1).
    tolerance, tolerance_step : float
        Pruning tolerance of the base round and its increase per recursive round.
    binning : str
        ``"frozen"`` (apply the reference bin edges) or ``"relative"`` (re-bin each
        snapshot by its own values).
    max_rounds : int
        Recursive rounds discovery was allowed.
    reference : dict
        What discovery saw: ``snapshots``, pooled ``rows`` and the last ``rounds`` run.
    version : str
        12 hex digits of sha256 over the canonical JSON body (computed, not passed).
    """

    features: tuple[FeatureDef, ...]
    feature_edges: tuple[np.ndarray, ...]
    bin_fraction: float
    tolerance: float
    binning: str
    max_rounds: int
    reference: dict[str, Any] = field(default_factory=dict)
    tolerance_step: float = 0.0
    version: str = field(init=False, default="")

    def __post_init__(self) -> None:
        check_parameters(
            bin_fraction=self.bin_fraction,
            tolerance=self.tolerance,
            tolerance_step=self.tolerance_step,
            binning=self.binning,
            max_rounds=self.max_rounds,
        )
        features = tuple(self.features)
        edges = tuple(np.asarray(e, dtype=np.float64).copy() for e in self.feature_edges)
        if len(edges) != len(features):
            raise ValueError(f"{len(features)} features but {len(edges)} sets of bin edges")
        for e in edges:
            e.setflags(write=False)
        set_field = object.__setattr__
        set_field(self, "features", features)
        set_field(self, "feature_edges", edges)
        set_field(self, "bin_fraction", float(self.bin_fraction))
        set_field(self, "tolerance", float(self.tolerance))
        set_field(self, "tolerance_step", float(self.tolerance_step))
        set_field(self, "max_rounds", int(self.max_rounds))
        set_field(self, "reference", dict(self.reference))
        digest = hashlib.sha256(_canonical(self._body()).encode()).hexdigest()
        set_field(self, "version", digest[:12])

    def __repr__(self) -> str:
        return (
            f"FeatureRecipe(version={self.version!r}, features={len(self.features)}, "
            f"binning={self.binning!r})"
        )

    def __eq__(self, other: object) -> bool:
        return isinstance(other, FeatureRecipe) and self.to_dict() == other.to_dict()

    def __hash__(self) -> int:
        return hash(self.version)

    @property
    def names(self) -> tuple[str, ...]:
        """Feature names in generation order."""
        return tuple(d.name for d in self.features)

    @property
    def edges(self) -> dict[str, np.ndarray]:
        """Frozen bin edges per feature name (read-only arrays)."""
        return {d.name: e for d, e in zip(self.features, self.feature_edges, strict=True)}

    # ---------------------------------------------------------------- discovery

    @classmethod
    def discover(
        cls,
        snapshots: Snapshot | Iterable[Snapshot],
        *,
        max_rounds: int = 3,
        bin_fraction: float = 0.5,
        tolerance: float = 1.0,
        tolerance_step: float = 1.0,
        binning: str = "frozen",
        rows: Sequence[np.ndarray] | None = None,
    ) -> FeatureRecipe:
        """Run ReFeX feature discovery on reference snapshots (Henderson et al., KDD 2011).

        Parameters
        ----------
        snapshots : Snapshot or iterable of Snapshot
            Reference windows; their node rows are pooled for binning and pruning.
        max_rounds : int
            Maximum recursive rounds after the base features (>= 0).
        bin_fraction : float
            ``p`` of vertical logarithmic binning, in (0, 1).
        tolerance : float
            ``s`` of the base round: binned columns differing by at most this on every
            node agree.
        tolerance_step : float
            Added to ``s`` at every recursive round, so round ``r`` prunes with
            ``tolerance + r * tolerance_step``. ReFeX raises the tolerance as the rounds go
            (Henderson et al., KDD 2011, as recalled); without it every round multiplies the
            kept features by about the number of aggregates (six here) and a three-round
            recipe keeps thousands of near-duplicate columns.
        binning : {"frozen", "relative"}
            How :meth:`transform` bins later snapshots.
        rows : sequence of array of int, optional
            Per snapshot, the rows (a sample of the accounts) that the bin edges and the
            pruning are learnt on; features are still computed on the whole snapshots.
            None: all rows.

        Returns
        -------
        FeatureRecipe

        Raises
        ------
        ValueError
            A parameter is out of range (the message names it), or no snapshot is given.
        """
        parameters: dict[str, Any] = {
            "bin_fraction": bin_fraction,
            "tolerance": tolerance,
            "tolerance_step": tolerance_step,
            "binning": binning,
            "max_rounds": max_rounds,
        }
        check_parameters(**parameters)  # before the graphs are built
        snaps = _as_snapshots(snapshots)
        picked: list[np.ndarray | None] = [None] * len(snaps) if rows is None else list(rows)
        if len(picked) != len(snaps):
            raise ValueError(f"{len(snaps)} snapshots but row samples for {len(picked)}")
        recipe, _ = cls.discover_on(
            [GraphColumns(SnapshotGraph(s), r) for s, r in zip(snaps, picked, strict=True)],
            accounts=int(sum(s.n_nodes for s in snaps)),
            sampled=rows is not None,
            **parameters,
        )
        return recipe

    @classmethod
    def discover_on(
        cls,
        windows: Sequence[ReferenceColumns],
        *,
        accounts: int,
        sampled: bool,
        max_rounds: int = 3,
        bin_fraction: float = 0.5,
        tolerance: float = 1.0,
        tolerance_step: float = 1.0,
        binning: str = "frozen",
    ) -> tuple[FeatureRecipe, np.ndarray]:
        """:meth:`discover` on reference windows wherever their graphs are held: in this
        process (:class:`~rolewatch.engine.features.discovery.GraphColumns`, what
        :meth:`discover` passes) or elsewhere, e.g. partitioned on a cluster, read at the
        sampled rows (ReFeX, Henderson et al., KDD 2011); with the sampled rows' bins.

        Parameters
        ----------
        windows : sequence of ReferenceColumns
            One per reference window, in order.
        accounts : int
            Accounts of all the windows together (the recipe's reference notes it).
        sampled : bool
            Whether the windows' rows are a sample (noted with their count).
        max_rounds, bin_fraction, tolerance, tolerance_step, binning
            As for :meth:`discover`.

        Returns
        -------
        recipe : FeatureRecipe
        binned : numpy.ndarray
            The windows' sampled rows, stacked in order, x the recipe's features: their bins
            by the frozen edges, what ``transform(snapshot).take(rows)`` bins with
            ``"frozen"`` binning (training's tables need nothing else).

        Raises
        ------
        ValueError
            A parameter is out of range (the message names it), or no window is given.
        """
        check_parameters(
            bin_fraction=bin_fraction,
            tolerance=tolerance,
            tolerance_step=tolerance_step,
            binning=binning,
            max_rounds=max_rounds,
        )
        if not windows:
            raise ValueError("discovery needs at least one reference window")
        found = discover_features(
            windows,
            max_rounds=max_rounds,
            bin_fraction=bin_fraction,
            tolerance=tolerance,
            tolerance_step=tolerance_step,
        )
        reference = {"snapshots": len(windows), "rows": accounts, "rounds": found.rounds}
        if sampled:
            reference["sampled_rows"] = int(sum(w.rows for w in windows))
        recipe = cls(
            features=tuple(found.features),
            feature_edges=tuple(found.edges),
            bin_fraction=bin_fraction,
            tolerance=tolerance,
            binning=binning,
            max_rounds=max_rounds,
            reference=reference,
            tolerance_step=tolerance_step,
        )
        return recipe, found.binned

    # ---------------------------------------------------------------- transform

    def transform(self, snapshot: Snapshot, *, binning: str | None = None) -> FeatureTable:
        """Compute exactly this recipe's features on ``snapshot``.

        Only the recipe's features (and their parents) are computed, by the same
        evaluation discovery used (ReFeX, Henderson et al., KDD 2011); egonet kernels run
        only when an egonet feature is needed.

        Parameters
        ----------
        snapshot : Snapshot
        binning : {"frozen", "relative"}, optional
            Overrides the recipe's mode for this call.

        Returns
        -------
        FeatureTable
        """
        if not isinstance(snapshot, Snapshot):
            raise TypeError(f"transform expects a Snapshot, got {type(snapshot).__name__}")
        mode = self.binning if binning is None else binning
        check_binning(mode)
        graph = SnapshotGraph(snapshot)
        raw = compute_features(graph, self.features)
        edges: Sequence[np.ndarray]
        if mode == "frozen":
            edges = self.feature_edges
        else:
            edges = [bin_edges(raw[:, j], self.bin_fraction) for j in range(raw.shape[1])]
        return FeatureTable(
            nodes=snapshot.nodes,
            names=self.names,
            raw=raw,
            binned=_binned(raw, edges),
            recipe_version=self.version,
            triangles=graph.counted_triangles(),
        )

    # ---------------------------------------------------------------- serialisation

    def _body(self) -> dict[str, Any]:
        return {
            "format": FORMAT,
            "format_version": FORMAT_VERSION,
            "bin_fraction": self.bin_fraction,
            "tolerance": self.tolerance,
            "tolerance_step": self.tolerance_step,
            "binning": self.binning,
            "max_rounds": self.max_rounds,
            "reference": self.reference,
            "features": [
                {
                    "name": d.name,
                    "op": d.op,
                    "parent": d.parent,
                    "round": d.round,
                    "edges": e.tolist(),
                }
                for d, e in zip(self.features, self.feature_edges, strict=True)
            ],
        }

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-serialisable dict (the body plus ``version``)."""
        body = self._body()
        body["version"] = self.version
        return body

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> FeatureRecipe:
        """Rebuild a recipe from :meth:`to_dict` output; checks format and version.

        Parameters
        ----------
        d : dict
            A stored recipe; one written before ``tolerance_step`` existed reads it as 0.

        Returns
        -------
        FeatureRecipe

        Raises
        ------
        ValueError
            When the dict is not a feature recipe, names an unknown feature, or its
            ``version`` does not match its content.
        """
        if not isinstance(d, dict) or d.get("format") != FORMAT:
            raise ValueError(f"not a feature recipe: expected format {FORMAT!r}")
        if d.get("format_version") != FORMAT_VERSION:
            raise ValueError(
                f"unsupported feature recipe format_version {d.get('format_version')!r}"
            )
        features, edges = _features_from_dicts(d["features"])
        recipe = cls(
            features=features,
            feature_edges=edges,
            bin_fraction=d["bin_fraction"],
            tolerance=d["tolerance"],
            binning=d["binning"],
            max_rounds=d["max_rounds"],
            reference=d.get("reference", {}),
            tolerance_step=d.get("tolerance_step", 0.0),
        )
        if "version" in d and d["version"] != recipe.version:
            raise ValueError(
                f"feature recipe version {d['version']!r} does not match its content "
                f"({recipe.version!r}); the recipe was edited or corrupted"
            )
        return recipe


def _features_from_dicts(
    entries: Sequence[dict[str, Any]],
) -> tuple[tuple[FeatureDef, ...], tuple[np.ndarray, ...]]:
    """Feature definitions and bin edges of a stored recipe, checked entry by entry."""
    defs, edges = [], []
    seen: set[str] = set()
    for f in entries:
        parsed = parse_feature(f["name"])
        if parsed.op != f["op"] or parsed.parent != f["parent"]:
            raise ValueError(f"feature {f['name']!r} does not match its op/parent")
        if parsed.parent is not None and parsed.parent not in seen:
            raise ValueError(f"feature {f['name']!r} comes before its parent {parsed.parent!r}")
        seen.add(parsed.name)
        defs.append(parsed)
        e = np.asarray(f["edges"], dtype=np.float64)
        if e.ndim != 1 or (e.size > 1 and np.any(np.diff(e) <= 0)) or not np.all(np.isfinite(e)):
            raise ValueError(f"feature {f['name']!r} has invalid bin edges")
        edges.append(e)
    return tuple(defs), tuple(edges)


def _canonical(body: dict[str, Any]) -> str:
    return json.dumps(
        body, sort_keys=True, separators=(",", ":"), ensure_ascii=True, allow_nan=False
    )


def _binned(raw: np.ndarray, edges: Sequence[np.ndarray]) -> np.ndarray:
    """Bin indices of every column of ``raw`` by its edges, in the smallest dtype that
    holds them (Fortran order, as ``raw``)."""
    n_bins = 1 + max((e.size for e in edges), default=0)
    binned = np.empty(raw.shape, dtype=bin_dtype(n_bins), order="F")
    for j, e in enumerate(edges):
        apply_bins(raw[:, j], e, out=binned[:, j])
    return binned


def _as_snapshots(snapshots: Snapshot | Iterable[Snapshot]) -> list[Snapshot]:
    if isinstance(snapshots, Snapshot):
        return [snapshots]
    out = list(snapshots)
    if not out:
        raise ValueError("discover needs at least one reference snapshot")
    for s in out:
        if not isinstance(s, Snapshot):
            raise TypeError(f"expected Snapshot objects, got {type(s).__name__}")
    return out
