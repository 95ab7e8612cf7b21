"""Reviewer keys on the command line (the real ``rolewatch`` process): the review scope and
display names."""

from __future__ import annotations

import os
import subprocess
import sys


def rolewatch(*args: str, url: str) -> subprocess.CompletedProcess:
    environment = {k: v for k, v in os.environ.items() if not k.startswith("ROLEWATCH_")}
    environment["ROLEWATCH_DATABASE_URL"] = url
    return subprocess.run(
        [sys.executable, "-m", "rolewatch.cli", *args],
        capture_output=True,
        text=True,
        env=environment,
        timeout=120,
    )


def test_review_keys_with_display_names(tmp_path):
    url = f"sqlite:///{tmp_path / 'keys.db'}"
    made = rolewatch("keys", "create", "--scope", "review", "--name", "Mira (T&S)", url=url)
    assert made.returncode == 0, made.stderr
    key_id = made.stdout.strip().split("_")[1]
    (line,) = [ln for ln in rolewatch("keys", "list", url=url).stdout.splitlines() if key_id in ln]
    assert line.split("\t")[1] == "review" and line.split("\t")[-1] == "Mira (T&S)"

    assert rolewatch("keys", "name", key_id, "Mira R.", url=url).returncode == 0
    listed = rolewatch("keys", "list", url=url).stdout
    assert "Mira R." in listed and "Mira (T&S)" not in listed

    bad_name = rolewatch("keys", "name", key_id, "x" * 101, url=url)
    assert bad_name.returncode == 2 and "display name" in bad_name.stderr
    unknown = rolewatch("keys", "name", "000000000000", "Someone", url=url)
    assert unknown.returncode == 2 and "no active key" in unknown.stderr
    wrong_scope = rolewatch("keys", "create", "--scope", "reviewer", url=url)
    assert wrong_scope.returncode == 2
