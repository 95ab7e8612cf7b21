"""A window closed on Dask whose raw feature values stay on the workers is kept for the next
window's evidence (its snapshot here, its values in the workers' scratch files), instead of
being measured on the cluster again; values that can no longer be read are measured again.
Either way the evidence is the local engine's (the fictional marketplace sample in
fixtures/sample, invented data; numbers within 1e-9 relative, docs/scale.md)."""

from __future__ import annotations

import logging

import pytest

from rolewatch.pipeline import closer
from rolewatch.pipeline.closer import close_due_windows
from rolewatch.pipeline.recent import RecentFeatures
from rolewatch.scale import dispatch
from rolewatch.scale.features import WorkerFeatureRows, _remove_scratch
from rolewatch.store.db import open_store
from rolewatch.store.events import ingest

from .conftest import NOW, sample_events, sample_settings
from .test_dask_equivalence import _alert_evidence, _assert_close_documents


class _Noting(RecentFeatures):
    """Notes each kept window it gives whose values are on the workers."""

    def __init__(self) -> None:
        super().__init__()
        self.on_workers: list[WorkerFeatureRows] = []

    def find(self, past, recipe_version):
        found = super().find(past, recipe_version)
        if found is not None and isinstance(found[1].raw, WorkerFeatureRows):
            self.on_workers.append(found[1].raw)
        return found


class _Wiping(_Noting):
    """Deletes the files of the kept values it gives from the workers' disks first, as a
    worker restarted under the same address has lost them."""

    def __init__(self, client) -> None:
        super().__init__()
        self.client = client

    def find(self, past, recipe_version):
        found = super().find(past, recipe_version)
        if found is not None and isinstance(found[1].raw, WorkerFeatureRows):
            table = found[1]
            paths = [s.path for v in (table.raw, table.binned) for p in v.pieces for s in p]
            self.client.run(_remove_scratch, [path for path in paths if path])
        return found


def _evidence_of_closes(dask_cluster, tmp_path, compute: str, recent: RecentFeatures, patch):
    settings = sample_settings(
        tmp_path / f"{compute}.db",
        compute=compute,
        dask_scheduler=dask_cluster.scheduler.address,
        dask_partitions=4,
    )
    patch.setattr(closer, "_recent_features", lambda _engine: recent)
    engine = open_store(settings)
    try:
        ingest(engine, settings, sample_events(), NOW)
        close_due_windows(engine, settings, now_us=NOW, drain=True)
        return _alert_evidence(engine)
    finally:
        engine.dispose()


def _assert_same_evidence(ours, local) -> None:
    assert local, "the sample raises alerts after training"
    assert [row[:2] for row in ours] == [row[:2] for row in local]
    for (_, _, on_dask), (_, _, here) in zip(ours, local, strict=True):
        assert on_dask["feature_moves"], "alerts show their feature moves"
        _assert_close_documents(on_dask, here)


@pytest.mark.slow
def test_the_next_evidence_reads_the_kept_values_on_the_workers(
    dask_cluster, tmp_path, monkeypatch
):
    monkeypatch.setattr(dispatch, "RAW_HERE_MAX_BYTES", 0)  # every window's values stay there
    local = _evidence_of_closes(dask_cluster, tmp_path, "local", RecentFeatures(), monkeypatch)
    kept = _Noting()
    on_dask = _evidence_of_closes(dask_cluster, tmp_path, "dask", kept, monkeypatch)
    assert kept.on_workers, "a window measured on the cluster served the next evidence"
    _assert_same_evidence(on_dask, local)


@pytest.mark.slow
def test_kept_values_the_workers_lost_are_measured_again(
    dask_cluster, tmp_path, monkeypatch, caplog
):
    monkeypatch.setattr(dispatch, "RAW_HERE_MAX_BYTES", 0)
    local = _evidence_of_closes(dask_cluster, tmp_path, "local", RecentFeatures(), monkeypatch)
    wiping = _Wiping(dask_cluster)
    with caplog.at_level(logging.WARNING, logger="rolewatch.pipeline"):
        on_dask = _evidence_of_closes(dask_cluster, tmp_path, "dask", wiping, monkeypatch)
    assert wiping.on_workers
    assert "could not be read" in caplog.text
    _assert_same_evidence(on_dask, local)
