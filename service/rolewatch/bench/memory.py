"""Peak resident memory of a bench's closing process, of its helper processes (the
communities' child, SQLite's window reader: the closing machine holds them too) and of Dask
worker processes, sampled every 0.2 s with psutil while a block runs."""

from __future__ import annotations

import threading
from typing import Any

__all__ = ["PeakMemory"]


def _helpers() -> dict[str, Any]:
    """The helper processes a close may start (the communities' child, SQLite's window
    reader): their peaks are the closing machine's too."""
    from rolewatch.pipeline import communities
    from rolewatch.store import sqlite_window_reader

    return {"communities": communities.HELPER, "window_reader": sqlite_window_reader.HELPER}


class PeakMemory:
    """Highest resident memory of this process, of its helper processes and of the given
    worker processes while the block runs."""

    def __init__(self, worker_pids: list[int]) -> None:
        import psutil

        self.me = psutil.Process()
        self.workers: list[Any] = [psutil.Process(pid) for pid in worker_pids]
        self.start_mb = self.me.memory_info().rss / 2**20
        self.peak_mb = 0.0
        self.worker_peak_mb = [0.0] * len(worker_pids)
        self.worker_restarts = 0
        self.helper_peak_mb = dict.fromkeys(_helpers(), 0.0)
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._sample, daemon=True)

    def _sample(self) -> None:
        import psutil

        while not self._stop.is_set():
            self.peak_mb = max(self.peak_mb, self.me.memory_info().rss / 2**20)
            for i, worker in enumerate(self.workers):
                if worker is None:
                    continue
                try:
                    rss = worker.memory_info().rss / 2**20
                except psutil.NoSuchProcess:  # Dask restarted a worker over its memory limit
                    self.worker_restarts += 1
                    self.workers[i] = None
                    continue
                self.worker_peak_mb[i] = max(self.worker_peak_mb[i], rss)
            for name, helper in _helpers().items():
                process = helper.process
                if process is None or process.poll() is not None:
                    continue
                try:
                    rss = psutil.Process(process.pid).memory_info().rss / 2**20
                except psutil.NoSuchProcess:
                    continue
                self.helper_peak_mb[name] = max(self.helper_peak_mb[name], rss)
            self._stop.wait(0.2)

    def __enter__(self) -> PeakMemory:
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        self._thread.join()
