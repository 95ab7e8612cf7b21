"""ReFeX features (Henderson et al., KDD 2011): binning, pruning, recipe lifecycle, bad input."""

import dataclasses
import hashlib
import json

import numpy as np
import pytest

from rolewatch.engine import FeatureRecipe, FeatureTable, Snapshot
from rolewatch.engine.features import (
    BASE_FEATURES,
    apply_bins,
    bin_dtype,
    bin_edges,
    max_bins,
    prune_agreeing,
    triangles_per_node,
)
from rolewatch.engine.features.definitions import compute_features, parse_feature
from rolewatch.engine.features.graph import SnapshotGraph

# Tolerance 0 in every round: every feature a test compares stays in the recipe.
UNPRUNED = {"tolerance": 0.0, "tolerance_step": 0.0}


def random_snapshot(seed, n=60, m=300, extra_isolated=3):
    rng = np.random.default_rng(seed)
    a, t = rng.integers(0, n, m), rng.integers(0, n, m)
    keep = a != t
    a, t = a[keep], t[keep]
    a, t = np.concatenate([a, t[:20]]), np.concatenate([t, a[:20]])  # some reciprocal pairs
    ids = np.array([f"member-{i:03d}" for i in range(n + extra_isolated)])
    return Snapshot.from_events(ids[a], ids[t], rng.gamma(2.0, 10.0, a.size), nodes=ids)


# ------------------------------------------------------------------ binning


def test_vertical_log_binning_worked_example():
    # Worked by hand (ReFeX vertical logarithmic binning, p = 0.5, Henderson et al. 2011):
    # values 1..8 -> lowest half {1,2,3,4} bin 0; lowest half of {5,6,7,8} = {5,6} bin 1;
    # of {7,8}: {7} bin 2; {8} bin 3.
    values = np.arange(1, 9, dtype=float)
    edges = bin_edges(values, 0.5)
    assert edges.tolist() == [4.0, 6.0, 7.0]
    assert apply_bins(values, edges).tolist() == [0, 0, 0, 0, 1, 1, 2, 3]


def test_binning_keeps_ties_together():
    # Worked by hand: 10 values, six zeros. ceil(0.5 * 10) = 5 lowest end on a 0, and every
    # tied 0 joins bin 0; the rest {1, 2, 2, 9}: lowest 2 = {1, 2} plus the tied 2 -> bin 1;
    # {9} -> bin 2.
    values = np.array([0, 0, 0, 0, 0, 0, 1, 2, 2, 9], dtype=float)
    edges = bin_edges(values, 0.5)
    assert apply_bins(values, edges).tolist() == [0, 0, 0, 0, 0, 0, 1, 1, 1, 2]
    # a later value above the reference maximum stays in the top bin, below the minimum in bin 0
    assert apply_bins(np.array([100.0, -5.0]), edges).tolist() == [2, 0]


def test_constant_and_empty_columns_bin_to_zero():
    assert bin_edges(np.zeros(7)).size == 0
    assert apply_bins(np.zeros(7), bin_edges(np.zeros(7))).tolist() == [0] * 7
    assert bin_edges(np.zeros(0)).size == 0


@pytest.mark.parametrize("fraction", [0.5, 0.2, 0.05, 0.01])
@pytest.mark.parametrize("n", [1, 2, 3, 10, 1000, 20000])
def test_bin_count_never_exceeds_the_bound_that_sizes_the_bin_dtype(n, fraction):
    # Distinct values are the worst case (no ties to merge bins); the bound is derived
    # in max_bins' docstring from the binning rule (Henderson et al., KDD 2011).
    values = np.random.default_rng(n).permutation(n).astype(float)
    edges = bin_edges(values, fraction)
    assert edges.size + 1 <= max_bins(n, fraction)
    bins = apply_bins(values, edges)
    assert bins.dtype == bin_dtype(edges.size + 1)
    assert bins.max(initial=0) == edges.size


def test_many_bins_use_a_wider_dtype_and_keep_their_values():
    # 2000 distinct values at p = 0.01 make more than 256 bins, which uint8 cannot hold.
    values = np.arange(2000, dtype=float)
    edges = bin_edges(values, 0.01)
    assert edges.size + 1 > 256
    bins = apply_bins(values, edges)
    assert bins.dtype == np.uint16
    np.testing.assert_array_equal(bins, np.searchsorted(edges, values, side="left"))
    with pytest.raises(ValueError, match="do not fit in uint8"):
        apply_bins(values, edges, out=np.empty(values.size, dtype=np.uint8))


def test_transform_keeps_bins_compact_and_equal_to_float_binning():
    snap = random_snapshot(4)
    recipe = FeatureRecipe.discover([snap], max_rounds=2, **UNPRUNED)
    table = recipe.transform(snap)
    assert table.binned.dtype == np.uint8
    for j, name in enumerate(recipe.names):
        floats = apply_bins(table.raw[:, j], recipe.edges[name], out=np.empty(snap.n_nodes))
        np.testing.assert_array_equal(table.binned[:, j], floats)


# ------------------------------------------------------------------ pruning


def test_pruning_merges_duplicated_columns_keeping_the_earliest():
    b = np.array([[0, 1, 0, 1, 2], [1, 0, 1, 0, 2], [2, 2, 2, 2, 0]], dtype=float)
    # columns 0 and 2 equal, 1 and 3 equal: keep 0, 1, 4
    assert prune_agreeing(b, 0.0).tolist() == [0, 1, 4]


def test_pruning_with_tolerance_uses_connected_components():
    # 0~1 (differ by 1) and 1~2 (differ by 1) but 0 vs 2 differ by 2: one component via 1
    b = np.array([[0, 1, 2, 5], [0, 1, 2, 5]], dtype=float)
    assert prune_agreeing(b, 1.0).tolist() == [0, 3]
    assert prune_agreeing(b, 0.0).tolist() == [0, 1, 2, 3]


def test_pruning_never_drops_fixed_columns():
    b = np.array([[0, 0, 0], [1, 1, 1]], dtype=float)
    assert prune_agreeing(b, 0.0, n_fixed=2).tolist() == [0, 1]


def test_pruning_exact_and_pairwise_paths_agree():
    rng = np.random.default_rng(0)
    base = rng.integers(0, 4, (5000, 6)).astype(float)
    b = base[:, [0, 1, 0, 2, 3, 1, 4, 5, 5]]
    exact = prune_agreeing(b, 0.0)
    pairwise = prune_agreeing(b, 0.5)  # integer bins: 0.5 agrees only on equality
    assert exact.tolist() == pairwise.tolist() == [0, 1, 3, 4, 6, 7]


# ------------------------------------------------------------------ recipe


def test_discover_and_transform_on_reference():
    snaps = [random_snapshot(s) for s in range(3)]
    recipe = FeatureRecipe.discover(snaps, max_rounds=2, **UNPRUNED)
    assert recipe.names[: len(BASE_FEATURES)] == BASE_FEATURES
    assert any(name.startswith("mean_out(") for name in recipe.names)
    table = recipe.transform(snaps[0])
    assert isinstance(table, FeatureTable)
    assert table.raw.shape == table.binned.shape == (snaps[0].n_nodes, len(recipe.names))
    assert table.recipe_version == recipe.version
    assert (table.binned >= 0).all() and np.isfinite(table.raw).all()
    assert table.nodes.tolist() == snaps[0].nodes.tolist()
    # features kept after pruning never agree on all pooled reference rows
    pooled = np.vstack([recipe.transform(s).binned for s in snaps])
    assert prune_agreeing(pooled, recipe.tolerance).size == pooled.shape[1]


def test_recursive_names_compute_from_parents():
    snap = random_snapshot(7)
    recipe = FeatureRecipe.discover([snap], max_rounds=2, **UNPRUNED)
    table = recipe.transform(snap)
    deep = [n for n in recipe.names if n.count("(") == 2][0]
    op, inner = deep.split("(", 1)
    inner = inner[:-1]
    parent = table.column(inner)
    A = (snap.counts > 0).astype(float)
    adj = {"in": A.T, "out": A, "all": ((A + A.T) > 0).astype(float)}[op.split("_")[1]]
    expect = adj @ parent
    if op.startswith("mean"):
        deg = np.asarray(adj.sum(axis=1)).ravel()
        expect = np.divide(expect, deg, out=np.zeros_like(expect), where=deg > 0)
    np.testing.assert_allclose(table.column(deep), expect)


def test_recipe_round_trip_and_version():
    snap = random_snapshot(1)
    recipe = FeatureRecipe.discover([snap], max_rounds=1, **UNPRUNED, binning="relative")
    d = json.loads(json.dumps(recipe.to_dict()))
    again = FeatureRecipe.from_dict(d)
    assert again == recipe and again.version == recipe.version and len(recipe.version) == 12
    np.testing.assert_array_equal(again.transform(snap).binned, recipe.transform(snap).binned)
    d["features"][0]["edges"] = [float(x) + 0.5 for x in d["features"][0]["edges"]]
    with pytest.raises(ValueError, match="does not match its content"):
        FeatureRecipe.from_dict(d)
    with pytest.raises(ValueError, match="not a feature recipe"):
        FeatureRecipe.from_dict({"format": "something else"})
    with pytest.raises(AttributeError):
        recipe.binning = "frozen"


def test_version_is_the_sha256_of_the_canonical_body():
    # A stored recipe written by hand; its version is recomputed with the standard library
    # (sha256, FIPS 180-4; JSON with sorted keys and no spaces), independently of the engine.
    body = {
        "format": "rolewatch.feature-recipe",
        "format_version": 1,
        "bin_fraction": 0.5,
        "tolerance": 1.0,
        "tolerance_step": 1.0,
        "binning": "frozen",
        "max_rounds": 3,
        "reference": {"snapshots": 1, "rows": 4, "rounds": 1},
        "features": [
            {"name": "degree", "op": "degree", "parent": None, "round": 0, "edges": [1.0]},
            {
                "name": "mean_out(degree)",
                "op": "mean_out",
                "parent": "degree",
                "round": 1,
                "edges": [0.5, 2.0],
            },
        ],
    }
    canonical = json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=True)
    expected = hashlib.sha256(canonical.encode()).hexdigest()[:12]
    recipe = FeatureRecipe.from_dict({**body, "version": expected})
    assert recipe.version == expected
    assert recipe.to_dict() == {**body, "version": expected}
    assert recipe.names == ("degree", "mean_out(degree)")
    # a frozen dataclass: a changed copy gets its own version, the original keeps its own
    relative = dataclasses.replace(recipe, binning="relative")
    assert relative.version != recipe.version == expected
    assert relative == FeatureRecipe.from_dict({**body, "binning": "relative"})
    with pytest.raises(dataclasses.FrozenInstanceError):
        recipe.tolerance = 2.0
    with pytest.raises(ValueError, match="read-only"):
        recipe.edges["degree"][0] = 3.0


def test_frozen_vs_relative_binning_on_a_later_window():
    reference = random_snapshot(2)
    later = random_snapshot(3, n=80, m=900)  # busier window
    frozen = FeatureRecipe.discover([reference], max_rounds=1, **UNPRUNED, binning="frozen")
    body = frozen.to_dict()
    body.pop("version")
    body["binning"] = "relative"
    relative = FeatureRecipe.from_dict(body)
    assert relative.version != frozen.version
    t_frozen, t_rel = frozen.transform(later), relative.transform(later)
    np.testing.assert_array_equal(t_frozen.raw, t_rel.raw)
    j = frozen.names.index("out_degree")
    expect_frozen = apply_bins(t_frozen.raw[:, j], frozen.edges["out_degree"])
    expect_rel = apply_bins(t_rel.raw[:, j], bin_edges(t_rel.raw[:, j], 0.5))
    np.testing.assert_array_equal(t_frozen.binned[:, j], expect_frozen)
    np.testing.assert_array_equal(t_rel.binned[:, j], expect_rel)
    assert frozen.transform(later, binning="relative").binned.tolist() == t_rel.binned.tolist()


def test_transform_computes_only_needed_features():
    snap = random_snapshot(4)
    full = FeatureRecipe.discover([snap], max_rounds=1, **UNPRUNED)
    body = full.to_dict()
    body["features"] = [
        f for f in body["features"] if not f["name"].startswith("ego") and "ego" not in f["name"]
    ]
    body.pop("version")
    local = FeatureRecipe.from_dict(body)
    g = SnapshotGraph(snap)
    compute_features(g, [parse_feature(n) for n in local.names])
    assert "tri" not in g._cache  # the triangle kernel was never run
    np.testing.assert_array_equal(
        local.transform(snap).raw,
        full.transform(snap).raw[:, [full.names.index(n) for n in local.names]],
    )


# ------------------------------------------------------------------ bad input


def test_empty_snapshot_features():
    empty = Snapshot.from_events([], [])
    recipe = FeatureRecipe.discover([random_snapshot(0)], max_rounds=1, **UNPRUNED)
    table = recipe.transform(empty)
    assert table.raw.shape == (0, len(recipe.names))
    # discovery on an empty window: every column is empty, so all agree; the first stays
    only = FeatureRecipe.discover([empty])
    assert only.names == (BASE_FEATURES[0],)


def test_one_edge_and_isolated_nodes():
    s = Snapshot.from_events(["a"], ["b"], [5.0], nodes=["a", "b", "c"])
    recipe = FeatureRecipe.discover([s], max_rounds=2, **UNPRUNED)
    t = recipe.transform(s)
    row_c = t.raw[2]
    assert (row_c == 0).all()  # isolated node: every count, sum and mean is 0
    assert t.column("out_degree").tolist() == [1.0, 0.0, 0.0]
    assert "out_strength" not in recipe.names  # bins agree with out_degree: pruned
    assert t.column("in_degree").tolist() == [0.0, 1.0, 0.0]


def test_all_zero_columns_are_pruned_to_one():
    # a directed path without reciprocity or triangles: reciprocity is 0 everywhere, so it
    # merges with any other all-zero column that comes later
    s = Snapshot.from_events(["a", "b", "c"], ["b", "c", "d"])
    recipe = FeatureRecipe.discover([s], max_rounds=1, **UNPRUNED)
    table = recipe.transform(s)
    zero_cols = [n for n in recipe.names if not table.column(n).any()]
    assert len(zero_cols) <= 1


BAD_PARAMETERS = [
    ({"bin_fraction": 1.0}, r"^bin_fraction must be between 0 and 1 \(exclusive\), got 1\.0$"),
    ({"bin_fraction": 0.0}, r"^bin_fraction must be between 0 and 1 \(exclusive\), got 0\.0$"),
    ({"tolerance": -1.0}, r"^tolerance must be a finite number >= 0, got -1\.0$"),
    ({"tolerance": float("inf")}, r"^tolerance must be a finite number >= 0, got inf$"),
    ({"tolerance_step": -0.5}, r"^tolerance_step must be a finite number >= 0, got -0\.5$"),
    ({"tolerance_step": float("nan")}, r"^tolerance_step must be a finite number >= 0, got nan$"),
    (
        {"binning": "sometimes"},
        r"^binning must be one of \('frozen', 'relative'\), got 'sometimes'$",
    ),
    ({"max_rounds": -1}, r"^max_rounds must be an integer >= 0, got -1$"),
    ({"max_rounds": 1.5}, r"^max_rounds must be an integer >= 0, got 1\.5$"),
]


@pytest.mark.parametrize("kwargs,message", BAD_PARAMETERS)
def test_bad_parameters_are_named_in_the_message(kwargs, message):
    with pytest.raises(ValueError, match=message):
        FeatureRecipe.discover([random_snapshot(0)], **kwargs)


@pytest.mark.parametrize("kwargs,message", BAD_PARAMETERS)
def test_stored_recipe_with_a_bad_parameter_names_it(kwargs, message):
    body = FeatureRecipe.discover([random_snapshot(0)], max_rounds=0).to_dict()
    body.pop("version")
    body.update(kwargs)
    with pytest.raises(ValueError, match=message):
        FeatureRecipe.from_dict(body)


def test_no_snapshots_is_an_error():
    with pytest.raises(ValueError, match="at least one"):
        FeatureRecipe.discover([])


# ------------------------------------------------------------------ hub


def test_hub_with_50000_leaves_and_a_few_triangles():
    # a star: triangles only where leaves are linked; oriented products stay linear
    leaves = np.array([f"leaf-{i}" for i in range(50_000)])
    actor = np.concatenate([np.full(50_000, "hub"), leaves[[0, 2, 4]]])
    target = np.concatenate([leaves, leaves[[1, 3, 5]]])
    s = Snapshot.from_events(actor, target)
    tri = triangles_per_node(s.counts)
    hub = s.index_of(["hub"])[0]
    assert tri[hub] == 3
    assert tri.sum() == 9  # 3 triangles x 3 corners
    g = SnapshotGraph(s)
    assert g.base("ego_edges")[hub] == 50_000 + 3
    assert g.base("ego_boundary_edges")[hub] == 0
    assert g.base("ego_arcs_within")[hub] == 50_000 + 3
    leaf = s.index_of(["leaf-9"])[0]  # a plain leaf: the hub's other 49,999 edges leave its egonet
    assert g.base("ego_boundary_edges")[leaf] == 49_999
    assert FeatureRecipe.discover([s], max_rounds=1, **UNPRUNED).transform(s).raw.shape[0] == 50_001
