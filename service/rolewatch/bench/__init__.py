"""``rolewatch bench`` cases: each module has ``run(case) -> Iterator[dict]``."""

from __future__ import annotations

import subprocess


def stop_server(process: subprocess.Popen, timeout: float = 30) -> None:
    """Stop a benchmark's server process: SIGTERM, then SIGKILL if it does not exit."""
    process.terminate()
    try:
        process.wait(timeout=timeout)
    except subprocess.TimeoutExpired:
        process.kill()
        process.wait()
