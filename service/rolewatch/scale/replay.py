"""``rolewatch replay FILE --to-archive``: a file of events written to the Parquet event
archive instead of the store, each event checked by the same rules as ingest."""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, field

from rolewatch.scale.archive import events_table, write_events
from rolewatch.store.events import validate_event

__all__ = ["ArchiveReplay", "archive_items"]

# Ingest refuses events too far in the future; an archive holds history, so only the
# representable range of times applies (year 9999).
_LATEST_US = 253_402_300_799_999_999


@dataclass
class ArchiveReplay:
    """What a replay into the archive wrote and refused (the first refusals, by line)."""

    written: int = 0
    rejected: int = 0
    errors: list[tuple[int, str]] = field(default_factory=list)

    SHOWN = 20

    def refuse(self, line: int, message: str) -> None:
        self.rejected += 1
        if len(self.errors) < self.SHOWN:
            self.errors.append((line, message))


def archive_items(
    items: Iterable[tuple[int, object]], archive: str, period_us: int, batch_size: int
) -> ArchiveReplay:
    """Validate (line, event) items and append the valid ones to the archive in batches."""
    totals = ArchiveReplay()
    batch: list[tuple[str, int, str, str, str | None, float]] = []
    for line, item in items:
        try:
            batch.append(validate_event(item, _LATEST_US, 0))
        except ValueError as error:
            totals.refuse(line, str(error))
            continue
        if len(batch) >= batch_size:
            totals.written += write_events(
                archive, events_table(*zip(*batch, strict=True)), period_us
            )
            batch = []
    if batch:
        totals.written += write_events(archive, events_table(*zip(*batch, strict=True)), period_us)
    return totals
