"""Role basis: RolX role extraction, frozen role profiles and membership refits.

RolX (Henderson et al., "RolX: structural role extraction & mining in large graphs",
KDD 2012) factorises the non-negative node-feature matrix V (n x f, the binned ReFeX
features) as V ~ G F with G (n x k) node-role memberships and F (k x f) role profiles,
choosing k by minimum description length.  Role dynamics (Rossi et al., WWW 2012 /
WSDM 2013) learns one such F over reference snapshots, freezes it, and refits G per
snapshot so that a role keeps its meaning over time; that is what :class:`RoleBasis`
holds and what :meth:`RoleBasis.memberships` does.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.optimize import linear_sum_assignment

from .errors import EngineInputError, FeatureMismatch, RecipeMismatch, TooManyRoles
from .mdl import EPS, candidate_role_counts, description_length
from .nnls import nnls_normal
from .rowkeys import row_keys
from .selection import choose_roles
from .stability import role_profile_distances

__all__ = [
    "Memberships",
    "RoleBasis",
    "description_length",
]

_FORMAT = "rolewatch.role_basis"
_FORMAT_VERSION = 1


@dataclass(frozen=True, eq=False)
class Memberships:
    """Role memberships of the rows of one feature table.

    Attributes
    ----------
    loadings : ndarray, shape (n, k)
        G >= 0, the non-negative least-squares fit of each row on the frozen F.
    mixture : ndarray, shape (n, k)
        ``loadings`` normalised to sum 1 per row; an all-zero row becomes uniform
        (a node with no structure is equally far from every role).  Rows of invalid
        input (NaN, inf or negative features) are NaN.
    error : ndarray, shape (n,)
        Relative reconstruction error ``||v - g F|| / max(||v||, eps)`` (0 for an
        all-zero row, NaN for invalid input).
    """

    loadings: np.ndarray
    mixture: np.ndarray
    error: np.ndarray


# ---------------------------------------------------------------------------
# input handling (duck-typed FeatureTable or plain ndarray)
# ---------------------------------------------------------------------------


def _table_parts(table: Any) -> tuple[np.ndarray, tuple[str, ...] | None, str | None]:
    """Return (binned matrix, feature names or None, recipe version or None).

    The matrix keeps an integer dtype (a :class:`FeatureTable`'s compact bins) and is
    otherwise float64.
    """
    if isinstance(table, np.ndarray) or not hasattr(table, "binned"):
        V = _as_matrix(table)
        names, version = None, None
    else:
        V = _as_matrix(table.binned)
        names = tuple(str(x) for x in table.names)
        version = getattr(table, "recipe_version", None)
    if V.ndim != 2:
        raise EngineInputError(
            f"a feature matrix must be 2-D (nodes x features), got shape {V.shape}"
        )
    if names is not None and len(names) != V.shape[1]:
        raise FeatureMismatch(
            f"feature table has {V.shape[1]} columns but {len(names)} feature names"
        )
    return V, names, version


def _as_matrix(values: Any) -> np.ndarray:
    V = np.asarray(values)
    return V if V.dtype.kind in "ui" else np.asarray(V, dtype=np.float64)


def _valid_rows(V: np.ndarray) -> np.ndarray:
    if V.dtype.kind == "u" or not V.size:
        return np.ones(V.shape[0], dtype=bool)
    if V.dtype.kind == "i":
        return np.asarray((V >= 0).all(axis=1))
    return np.asarray(np.isfinite(V).all(axis=1) & (V >= 0).all(axis=1))


def _float_blocks(
    V: np.ndarray, rows_per_block: int = 16_384
) -> Iterator[tuple[slice, np.ndarray]]:
    """Yield ``(row slice, float64 copy of those rows of V)``, a block at a time.

    Memberships of a million-row window then need a few MB of float64 at once instead
    of a float64 copy of the whole (compact, integer) feature table.
    """
    for start in range(0, V.shape[0], rows_per_block):
        rows = slice(start, min(start + rows_per_block, V.shape[0]))
        yield rows, np.array(V[rows], dtype=np.float64, order="C")


def _stack(tables: Any) -> tuple[np.ndarray, tuple[str, ...] | None, str | None]:
    if isinstance(tables, np.ndarray) or hasattr(tables, "binned"):
        tables = [tables]
    parts = [_table_parts(t) for t in tables]
    if not parts:
        raise EngineInputError("no feature tables given; pass at least one table to fit")
    names, version = parts[0][1], parts[0][2]
    for V, n2, v2 in parts[1:]:
        if v2 != version:
            raise RecipeMismatch(v2, version)
        if n2 != names or V.shape[1] != parts[0][0].shape[1]:
            raise FeatureMismatch(
                "the feature tables to stack have different feature columns; build them "
                "all with the same feature recipe"
            )
    return np.vstack([p[0] for p in parts], dtype=np.float64), names, version


def _reference_rows(
    tables: Any,
) -> tuple[np.ndarray, np.ndarray, tuple[str, ...], str | None, int]:
    """Stacked usable reference rows, their keys (:func:`rolewatch.engine.rowkeys.row_keys`),
    feature names, recipe version and rows dropped.

    Rows with NaN, inf or negative values are left out; plain arrays get names
    ``f0, f1, ...``.

    Raises
    ------
    EngineInputError
        No usable row, or every value is zero.
    """
    V, names, recipe_version = _stack(tables)
    n_all, f = V.shape
    valid = _valid_rows(V)
    V, keys = V[valid], row_keys(tables)[valid]
    if names is None:
        names = tuple(f"f{j}" for j in range(f))
    if V.shape[0] == 0 or f == 0:
        raise EngineInputError(
            "no usable rows to fit roles on (every row has NaN, inf or negative "
            "values, or the table is empty)"
        )
    if not (V > 0).any():
        raise EngineInputError(
            "every feature value is zero; roles need a reference period with activity"
        )
    return V, keys, names, recipe_version, int(n_all - V.shape[0])


def _normalise_profiles(G: np.ndarray, F: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Scale each role profile to sum 1 and move the scale into G (V ~ G F unchanged)."""
    sums = F.sum(axis=1)
    keep = sums > 0
    F = F[keep] / sums[keep, None]
    G = G[:, keep] * sums[keep][None, :]
    return G, F


# ---------------------------------------------------------------------------
# the frozen basis
# ---------------------------------------------------------------------------


def _frozen(a: np.ndarray) -> np.ndarray:
    a = np.array(a, dtype=np.float64, copy=True)
    a.setflags(write=False)
    return a


def _version_of(
    F: np.ndarray, role_ids: Sequence[int], names: Sequence[str], recipe_version: str | None
) -> str:
    body = {
        "F": [[float(x) for x in row] for row in F],
        "role_ids": [int(r) for r in role_ids],
        "feature_names": list(names),
        "recipe_version": recipe_version,
    }
    text = json.dumps(body, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:16]


@dataclass(frozen=True, eq=False)
class RoleBasis:
    """A frozen set of roles: profiles F with stable ids, fitted by RolX.

    Attributes
    ----------
    F : ndarray, shape (k, f)
        Non-negative role profiles in binned feature space, each row summing to 1 (the
        scale lives in the memberships).  Read-only.
    role_ids : tuple of int
        Stable role ids, one per row of F; kept across refits by :meth:`aligned_to`.
    feature_names : tuple of str
        Feature column names (``f0, f1, ...`` when fitted on a plain array).
    recipe_version : str or None
        Version of the feature recipe the basis was fitted on (None for plain arrays).
    version : str
        Short sha256 of F, role ids, feature names and recipe version.
    summary : dict
        Training summary: rows, features, chosen k, how k was chosen, the table of
        candidates (description length and stability per k), the chosen k's bits per
        value, relative reconstruction error.

    Notes
    -----
    Henderson et al., KDD 2012 (RolX) for the factorisation and model selection;
    Rossi et al., WWW 2012 / WSDM 2013 for keeping one global basis over snapshots and
    refitting memberships per snapshot.
    """

    F: np.ndarray
    role_ids: tuple[int, ...]
    feature_names: tuple[str, ...]
    recipe_version: str | None
    version: str = ""
    summary: dict = field(default_factory=dict)

    def __post_init__(self) -> None:
        F = np.asarray(self.F, dtype=np.float64)
        if F.ndim != 2:
            raise EngineInputError(f"role profiles F must be 2-D (roles x features), got {F.shape}")
        if not np.isfinite(F).all() or (F < 0).any():
            raise EngineInputError("role profiles F must be finite and non-negative")
        k, f = F.shape
        ids = tuple(int(r) for r in self.role_ids)
        names = tuple(str(x) for x in self.feature_names)
        if len(ids) != k or len(set(ids)) != k:
            raise EngineInputError(f"need {k} distinct role ids, got {self.role_ids!r}")
        if len(names) != f:
            raise FeatureMismatch(f"F has {f} feature columns but {len(names)} names")
        if k > f:
            raise TooManyRoles(
                f"a basis with {k} roles over {f} features cannot be identified; use at "
                f"most {f} roles or a feature recipe with more features"
            )
        object.__setattr__(self, "F", _frozen(F))
        object.__setattr__(self, "role_ids", ids)
        object.__setattr__(self, "feature_names", names)
        object.__setattr__(self, "version", _version_of(F, ids, names, self.recipe_version))
        object.__setattr__(self, "summary", dict(self.summary))

    @property
    def n_roles(self) -> int:
        """Number of roles k."""
        return self.F.shape[0]

    # -- fitting ------------------------------------------------------------------

    @classmethod
    def fit(
        cls,
        tables: Any,
        *,
        n_roles: int | None = None,
        k_range: tuple[int, int] = (2, 12),
        seed: int = 0,
        sample_rows: int | None = 4_000,
        stability_min: float = 0.90,
        tolerance: float = 0.10,
        resamples: int = 5,
        measure_all: bool = False,
    ) -> RoleBasis:
        """Fit a role basis on one or more reference feature tables (RolX).

        Parameters
        ----------
        tables : FeatureTable, ndarray, or sequence of them
            Reference tables; their ``binned`` matrices are stacked row-wise.  All must
            come from the same recipe.  Rows with NaN, inf or negative values are left
            out (counted in ``summary["rows_dropped"]``).
        n_roles : int, optional
            Fixed number of roles.  None chooses k within ``k_range`` (inclusive) by
            description length among reproducible k
            (:func:`rolewatch.engine.selection.choose_roles`).
        k_range : (int, int)
            Smallest and largest k tried; clipped to the number of features and rows.
        seed : int
            Random state for scikit-learn's NMF, the row sample and the resamples; the
            fit is deterministic given it.
        sample_rows : int, optional
            Candidates are compared on a sample of this many rows chosen by a seeded hash
            of the account id (every candidate on the same sample); the chosen k is then
            fitted on all rows, warm-started from its sample fit.  None uses all rows.
        stability_min : float
            Smallest agreement of role profiles across fits on 90 % resamples for a k to
            count as reproducible (:mod:`rolewatch.engine.stability`).
        tolerance : float
            The smallest reproducible k whose description length is within this share
            of the least is chosen.
        resamples : int
            Resampled fits per candidate k.
        measure_all : bool
            Measure every candidate k for the summary table (reports), not only up to
            where the selection's walk ends; the choice is the same.

        Returns
        -------
        RoleBasis

        Raises
        ------
        TooManyRoles
            ``n_roles`` exceeds the number of features (or rows).
        RecipeMismatch, FeatureMismatch
            Tables from different recipes.
        EngineInputError
            No usable rows, or V is all zeros.

        Notes
        -----
        V ~ G F by scikit-learn ``NMF`` (Henderson et al., KDD 2012, Section 3); the
        number of roles follows :func:`rolewatch.engine.selection.choose_roles`.
        """
        V, keys, names, recipe_version, dropped = _reference_rows(tables)
        n, f = V.shape
        candidates = candidate_role_counts(n_roles, k_range, f, n)
        choice = choose_roles(
            V,
            candidates,
            keys=keys,
            seed=seed,
            sample_rows=sample_rows,
            stability_min=stability_min,
            tolerance=tolerance,
            resamples=resamples,
            measure_all=measure_all,
        )
        chosen = [row for row in choice.table if row["k"] == choice.chosen]
        G, F = _normalise_profiles(choice.G, choice.F)
        rel_err = float(np.linalg.norm(V - G @ F) / max(float(np.linalg.norm(V)), EPS))
        summary = {
            "rows": int(n),
            "rows_dropped": dropped,
            "features": int(f),
            "n_roles": int(F.shape[0]),
            "selection": "fixed" if n_roles is not None else "mdl+stability",
            "bits_per_value": int(chosen[0]["bits_per_value"]) if chosen else None,
            "stability_min": float(stability_min),
            "mdl_tolerance": float(tolerance),
            "seed": int(seed),
            "mdl": choice.table,
            "mdl_rows": choice.sample_rows,
            "relative_error": rel_err,
        }
        return cls(
            F=F,
            role_ids=tuple(range(F.shape[0])),
            feature_names=names,
            recipe_version=recipe_version,
            summary=summary,
        )

    # -- refitting memberships ----------------------------------------------------

    def _check_table(self, table: Any) -> np.ndarray:
        V, names, version = _table_parts(table)
        if (
            version is not None
            and self.recipe_version is not None
            and version != self.recipe_version
        ):
            raise RecipeMismatch(version, self.recipe_version)
        if V.shape[1] != len(self.feature_names):
            raise FeatureMismatch(
                f"table has {V.shape[1]} features but the basis expects "
                f"{len(self.feature_names)} ({self.recipe_version=}); transform the snapshot "
                "with the recipe the basis was fitted on"
            )
        if names is not None and names != self.feature_names and version is None:
            raise FeatureMismatch("table feature names differ from the basis feature names")
        return V

    def memberships(self, table: Any) -> Memberships:
        """Refit role memberships of every row of ``table`` against the frozen F.

        Solves ``min ||v_i - g_i F||_2, g_i >= 0`` for all rows at once by block
        principal pivoting (exact NNLS; see :mod:`rolewatch.engine.nnls`), as role
        dynamics does per snapshot (Rossi et al., WWW 2012 / WSDM 2013) with the RolX
        factorisation (Henderson et al., KDD 2012).

        Parameters
        ----------
        table : FeatureTable or ndarray, shape (n, f)

        Returns
        -------
        Memberships
            Rows with NaN, inf or negative features get NaN results; the other rows are
            unaffected.

        Raises
        ------
        RecipeMismatch
            The table's recipe version differs from the basis's.
        FeatureMismatch
            Wrong number of feature columns.
        """
        V = self._check_table(table)
        n, k = V.shape[0], self.n_roles
        valid = _valid_rows(V)
        Vv = V[valid] if not valid.all() else V
        F = self.F
        rhs = np.empty((Vv.shape[0], k))
        for rows, block in _float_blocks(Vv):
            np.matmul(block, F.T, out=rhs[rows])
        G = nnls_normal(F @ F.T, rhs)
        err = np.empty(Vv.shape[0])
        for rows, block in _float_blocks(Vv):
            norm = np.sqrt(np.einsum("ij,ij->i", block, block))
            np.subtract(block, G[rows] @ F, out=block)
            resid = np.sqrt(np.einsum("ij,ij->i", block, block))
            err[rows] = resid / np.maximum(norm, EPS)
        sums = G.sum(axis=1, keepdims=True)
        mix = np.divide(G, sums, out=np.full_like(G, 1.0 / k), where=sums > 0)
        if valid.all():
            return Memberships(loadings=G, mixture=mix, error=err)
        out_g = np.full((n, k), np.nan)
        out_m = np.full((n, k), np.nan)
        out_e = np.full(n, np.nan)
        out_g[valid], out_m[valid], out_e[valid] = G, mix, err
        return Memberships(loadings=out_g, mixture=out_m, error=out_e)

    # -- keeping ids across refits ----------------------------------------------

    def aligned_to(self, previous: RoleBasis, *, max_distance: float | None = None) -> RoleBasis:
        """Return this basis with role ids matched to ``previous`` where roles persist.

        Roles are matched by :func:`scipy.optimize.linear_sum_assignment` on the
        Hellinger distance between role profiles (rows of F, each a distribution over
        features).  When the feature names differ, the match uses the features both
        bases share (profiles renormalised on them).  Matched roles take the previous
        id; unmatched roles (more roles than before, or a match farther than
        ``max_distance``) get fresh ids above the largest previous id.  Rows are
        returned in ascending id order.  Keeping one role basis meaningful over time
        follows Rossi et al. (WWW 2012 / WSDM 2013).

        Parameters
        ----------
        previous : RoleBasis
            The basis whose ids persisting roles keep.
        max_distance : float, optional
            Largest Hellinger distance a matched pair may have; None matches every role
            the assignment pairs.

        Returns
        -------
        RoleBasis
            Same profiles with re-assigned ids; ``summary["aligned_to"]`` records the
            previous version and the matches.

        Raises
        ------
        FeatureMismatch
            The two bases share no feature.
        """
        cur_F, prev_F = self.F, previous.F
        if self.feature_names != previous.feature_names:
            common = [x for x in self.feature_names if x in set(previous.feature_names)]
            if not common:
                raise FeatureMismatch(
                    "the new and previous bases share no feature; role ids cannot be "
                    "matched (fit both on tables of a shared recipe)"
                )
            ci = {x: i for i, x in enumerate(self.feature_names)}
            pi = {x: i for i, x in enumerate(previous.feature_names)}
            cur_F = cur_F[:, [ci[x] for x in common]]
            prev_F = prev_F[:, [pi[x] for x in common]]
        cost = role_profile_distances(cur_F, prev_F)
        rows, cols = linear_sum_assignment(cost)
        prev_ids = np.asarray(previous.role_ids)
        new_ids = np.full(self.n_roles, -1, dtype=np.int64)
        matches = []
        for r, c in zip(rows, cols, strict=True):
            if max_distance is not None and cost[r, c] > max_distance:
                continue
            new_ids[r] = prev_ids[c]
            matches.append({"role_id": int(prev_ids[c]), "distance": float(cost[r, c])})
        next_id = int(prev_ids.max(initial=-1)) + 1
        for r in np.flatnonzero(new_ids < 0):
            new_ids[r] = next_id
            next_id += 1
        order = np.argsort(new_ids, kind="stable")
        summary = dict(self.summary)
        summary["aligned_to"] = {"version": previous.version, "matches": matches}
        return RoleBasis(
            F=self.F[order],
            role_ids=tuple(int(x) for x in new_ids[order]),
            feature_names=self.feature_names,
            recipe_version=self.recipe_version,
            summary=summary,
        )

    # -- serialisation ------------------------------------------------------------

    def to_dict(self) -> dict:
        """Plain-JSON form (lists and numbers); :meth:`from_dict` restores it exactly."""
        return {
            "format": _FORMAT,
            "format_version": _FORMAT_VERSION,
            "version": self.version,
            "recipe_version": self.recipe_version,
            "feature_names": list(self.feature_names),
            "role_ids": list(self.role_ids),
            "F": [[float(x) for x in row] for row in self.F],
            "summary": json.loads(json.dumps(self.summary)),
        }

    @classmethod
    def from_dict(cls, d: dict) -> RoleBasis:
        """Rebuild a basis from :meth:`to_dict` output.

        Parameters
        ----------
        d : dict
            A stored role basis document.

        Returns
        -------
        RoleBasis

        Raises
        ------
        EngineInputError
            Not a role basis document, or its version hash does not match its content
            (the document was edited or corrupted).
        """
        if not isinstance(d, dict) or d.get("format") != _FORMAT:
            raise EngineInputError("not a rolewatch role basis document (missing format tag)")
        if d.get("format_version") != _FORMAT_VERSION:
            raise EngineInputError(
                f"role basis format version {d.get('format_version')!r} is not supported "
                f"(expected {_FORMAT_VERSION})"
            )
        F = np.asarray(d["F"], dtype=np.float64)
        if F.ndim != 2:
            F = F.reshape(len(d["role_ids"]), len(d["feature_names"]))
        basis = cls(
            F=F,
            role_ids=tuple(d["role_ids"]),
            feature_names=tuple(d["feature_names"]),
            recipe_version=d.get("recipe_version"),
            summary=d.get("summary", {}),
        )
        if d.get("version") and d["version"] != basis.version:
            raise EngineInputError(
                f"role basis document says version {d['version']!r} but its content hashes "
                f"to {basis.version!r}; the document was changed or corrupted"
            )
        return basis
