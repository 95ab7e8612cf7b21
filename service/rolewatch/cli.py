"""The ``rolewatch`` command: serve, keys, replay, bench, demo, evaluate.

Exit codes: 0 success; 2 usage or configuration error (the message says what to fix);
1 anything else. Every command takes ``--config FILE`` (a TOML file of settings); every
setting can also come from a ``ROLEWATCH_*`` environment variable.
"""

from __future__ import annotations

import argparse
import csv
import importlib
import inspect
import json
import os
import signal
import sys
from collections.abc import Iterator, Sequence
from pathlib import Path
from types import ModuleType
from typing import TYPE_CHECKING, Any

from rolewatch.clock import now_micros

if TYPE_CHECKING:
    from sqlalchemy.engine import Engine

    from rolewatch.config import Settings
    from rolewatch.store.events import IngestResult


class UsageError(Exception):
    """A wrong command line or input path: exit code 2."""


def _now_us() -> int:
    return now_micros()


def _settings(args: argparse.Namespace, **overrides: Any) -> Settings:
    from rolewatch.config import load_settings

    return load_settings(getattr(args, "config", None), **overrides)


def _store(settings: Settings) -> Engine:
    from rolewatch.store.db import open_store

    return open_store(settings)


# --- serve -----------------------------------------------------------------------------------


def cmd_serve(args) -> int:
    """Run the HTTP service (and, by role, the background jobs) with uvicorn."""
    import uvicorn

    from rolewatch.api.app import create_app
    from rolewatch.api.serving import http_protocol
    from rolewatch.logs import configure_logging

    overrides = {
        k: v
        for k, v in (("host", args.host), ("port", args.port), ("role", args.role))
        if v is not None
    }
    settings = _settings(args, **overrides)
    configure_logging(settings.log_level, json_lines=settings.log_json)
    _store(settings).dispose()  # fail here, with a clear message, when the store is unusable
    app = create_app(settings)

    def _stopped(signum, _frame):  # uvicorn re-raises SIGTERM/SIGINT after its graceful stop
        raise SystemExit(0)

    signal.signal(signal.SIGTERM, _stopped)
    try:
        uvicorn.run(
            app,
            host=settings.host,
            port=settings.port,
            log_config=None,
            timeout_graceful_shutdown=30,
            access_log=False,
            http=http_protocol(settings),
        )
    except SystemExit as stop:  # uvicorn exits 3 when startup fails: report it as 1
        return 0 if not stop.code else 1
    return 0


# --- keys ------------------------------------------------------------------------------------


def cmd_keys(args) -> int:
    from rolewatch.clock import to_rfc3339
    from rolewatch.store import keys

    settings = _settings(args)
    engine = _store(settings)
    try:
        if args.keys_command == "create":
            try:
                _, key = keys.create_key(
                    engine, args.scope, label=args.label, now_us=_now_us(), name=args.name
                )
            except ValueError as error:
                raise UsageError(str(error)) from None
            print(key)  # only the key on stdout, so `KEY=$(rolewatch keys create ...)` works
            print("store this key now: it is shown only once", file=sys.stderr)
        elif args.keys_command == "list":
            for record in keys.list_keys(engine):
                state = (
                    "revoked " + to_rfc3339(record.revoked_us) if record.revoked_us else "active"
                )
                print(
                    "\t".join(
                        [
                            record.key_id,
                            ",".join(record.scopes),
                            state,
                            to_rfc3339(record.created_us),
                            record.label or "",
                            record.display_name or "",
                        ]
                    )
                )
        elif args.keys_command == "revoke":
            if not keys.revoke_key(engine, args.key_id, now_us=_now_us()):
                raise UsageError(
                    f"no active key with id {args.key_id!r}: see 'rolewatch keys list'"
                )
            print(f"revoked {args.key_id}", file=sys.stderr)
        elif args.keys_command == "name":
            try:
                named = keys.set_display_name(engine, args.key_id, args.name)
            except ValueError as error:
                raise UsageError(str(error)) from None
            if not named:
                raise UsageError(
                    f"no active key with id {args.key_id!r}: see 'rolewatch keys list'"
                )
            print(f"named {args.key_id}", file=sys.stderr)
    finally:
        engine.dispose()
    return 0


# --- replay ----------------------------------------------------------------------------------


def _counting(handle, bar) -> Iterator[str]:
    """The lines of ``handle``, advancing the progress bar by each line's length."""
    for line in handle:
        bar.update(len(line))
        yield line


def _ndjson_items(lines) -> Iterator[tuple[int, object]]:
    """(line number, parsed event or InvalidEvent) for each non-blank line."""
    import orjson

    from rolewatch.store.events import InvalidEvent

    for number, line in enumerate(lines, start=1):
        if not line.strip():
            continue
        try:
            item = orjson.loads(line)
        except orjson.JSONDecodeError:
            try:
                item = json.loads(line)
            except ValueError as error:
                item = InvalidEvent(f"line {number} is not valid JSON: {error}")
        yield number, item


def _csv_cell(name: str, value: str):
    if name == "weight":
        try:
            return float(value)
        except ValueError:
            return value  # rejected by validation with a readable reason
    return value


def _check_csv_header(names: Sequence[str]) -> None:
    """Stop the replay (exit 2) when the header lacks a required column or names one that is
    no event field: every line would be rejected for the same reason."""
    from rolewatch.store.events import FIELDS

    missing = [name for name in ("time", "actor", "target") if name not in names]
    if missing:
        raise UsageError(
            f"the CSV header lacks the column{'s' if len(missing) > 1 else ''} "
            f"{', '.join(missing)}; the first line must name the columns, e.g. "
            "id,time,actor,target,kind,weight. Nothing was stored"
        )
    unknown = [name for name in names if name not in FIELDS]
    if unknown:
        raise UsageError(
            f"the CSV header names the column {unknown[0]!r}, which is no event field; "
            f"allowed: {', '.join(FIELDS)}. Nothing was stored"
        )


def _csv_items(lines) -> Iterator[tuple[int, object]]:
    """(line number, event) for each CSV row; the header names the fields, empty cells are
    absent fields."""
    reader = csv.DictReader(lines)
    if reader.fieldnames is None:
        return
    _check_csv_header(reader.fieldnames)
    for row in reader:
        event = {
            k: _csv_cell(k, v) for k, v in row.items() if k is not None and v not in (None, "")
        }
        if None in row:
            event["(extra cells)"] = row[None]
        yield reader.line_num, event


def _file_digest(path: Path) -> str:
    """Hex sha256 of the file's bytes."""
    import hashlib

    digest = hashlib.sha256()
    with path.open("rb") as handle:
        for chunk in iter(lambda: handle.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


def _with_line_ids(items, file_digest: str) -> Iterator[tuple[int, object]]:
    """Give each event without an id one made from the file and its line
    (:func:`rolewatch.store.events.file_line_event_id`)."""
    from rolewatch.store.events import file_line_event_id

    for number, item in items:
        if isinstance(item, dict) and item.get("id") is None:
            item["id"] = file_line_event_id(file_digest, number)
        yield number, item


class _ReplayTotals:
    """Counts over every batch of a replay; the first rejected lines are printed."""

    SHOWN = 20

    def __init__(self) -> None:
        self.counts = {"accepted": 0, "duplicates": 0, "late": 0, "rejected": 0, "conflicts": 0}
        self.shown = 0

    def add(self, result: IngestResult, lines: list[int]) -> None:
        """Count one batch's result; ``lines`` are its events' line numbers."""
        self.counts["accepted"] += result.accepted
        self.counts["duplicates"] += result.duplicates
        self.counts["late"] += result.late
        self.counts["rejected"] += len(result.rejected)
        self.counts["conflicts"] += len(result.conflicts)
        for rejected in result.rejected + result.conflicts:
            if self.shown < self.SHOWN:
                print(f"line {lines[rejected['index']]}: {rejected['error']}", file=sys.stderr)
                self.shown += 1

    def report_hidden(self) -> None:
        hidden = self.counts["rejected"] + self.counts["conflicts"] - self.shown
        if hidden > 0:
            print(f"... and {hidden} more rejected or conflicting lines", file=sys.stderr)


def _replay_file(
    engine: Engine, settings: Settings, path: Path, fmt: str, batch_size: int, *, progress: bool
) -> _ReplayTotals:
    """Ingest the file's events in batches of ``batch_size``, with a progress bar."""
    from tqdm import tqdm

    from rolewatch.store.events import ingest

    totals = _ReplayTotals()
    handle = path.open("r", encoding="utf-8", errors="strict", newline="" if fmt == "csv" else None)
    size = path.stat().st_size
    bar = tqdm(
        total=size,
        unit="B",
        unit_scale=True,
        file=sys.stderr,
        desc=f"replay {path.name}",
        disable=not progress,
    )
    with handle, bar:
        counted = _counting(handle, bar)
        items = _with_line_ids(
            _csv_items(counted) if fmt == "csv" else _ndjson_items(counted), _file_digest(path)
        )
        batch: list = []
        lines: list[int] = []
        for number, item in items:
            batch.append(item)
            lines.append(number)
            if len(batch) >= batch_size:
                totals.add(ingest(engine, settings, batch, _now_us()), lines)
                batch, lines = [], []
        if batch:
            totals.add(ingest(engine, settings, batch, _now_us()), lines)
        bar.update(max(0, size - bar.n))
    return totals


def cmd_replay(args: argparse.Namespace) -> int:
    """Feed a file of events through the same ingest path as the API, then close windows."""
    path = Path(args.file)
    if not path.is_file():
        raise UsageError(f"{path} does not exist or is not a file: check the path")
    settings = _settings(args)
    fmt = args.format or ("csv" if path.suffix.lower() == ".csv" else "ndjson")
    batch_size = args.batch_size or min(settings.max_batch_events, 5000)
    if args.to_archive is not None:
        return _replay_to_archive(settings, path, fmt, args.to_archive or settings.event_archive)
    engine = _store(settings)
    try:
        totals = _replay_file(
            engine, settings, path, fmt, batch_size, progress=not args.no_progress
        )
        totals.report_hidden()
        summary: dict[str, Any] = dict(totals.counts, file=str(path), format=fmt)
        if not args.no_close:
            from rolewatch.pipeline.closer import close_due_windows

            closed = close_due_windows(engine, settings, now_us=_now_us(), drain=True)
            summary["windows_closed"] = len(closed)
        print(json.dumps(summary))
    except UnicodeDecodeError as error:
        raise UsageError(f"{path} is not UTF-8 text ({error}); convert it to UTF-8") from None
    finally:
        engine.dispose()
    return 0


def _replay_to_archive(settings: Settings, path: Path, fmt: str, archive: str | None) -> int:
    """Write the file's events to the Parquet event archive (docs/scale.md)."""
    if not archive:
        raise UsageError("--to-archive needs a path: write --to-archive PATH or set event_archive")
    try:
        from rolewatch.scale.replay import archive_items
    except ImportError as error:
        raise UsageError(
            f"--to-archive needs pyarrow ({error}); install it with pip install 'rolewatch[scale]'"
        ) from None
    from rolewatch.pipeline.windows import WindowGeometry

    with path.open("r", encoding="utf-8", newline="" if fmt == "csv" else None) as handle:
        items = _with_line_ids(
            _csv_items(handle) if fmt == "csv" else _ndjson_items(handle), _file_digest(path)
        )
        try:
            totals = archive_items(
                items, archive, WindowGeometry.from_settings(settings).period_us, 100_000
            )
        except UnicodeDecodeError as error:
            raise UsageError(f"{path} is not UTF-8 text ({error}); convert it to UTF-8") from None
    for line, message in totals.errors:
        print(f"line {line}: {message}", file=sys.stderr)
    summary = {"written": totals.written, "rejected": totals.rejected, "archive": archive}
    print(json.dumps(dict(summary, file=str(path), format=fmt)))
    return 0


# --- bench -----------------------------------------------------------------------------------

BENCH_MODULES = (
    "ingest",
    "history",
    "close",
    "engine_features",
    "engine_roles",
    "engine_naming",
    "load",
    "detection",
    "scale",
    "scale_archive",
    "scale_training",
)


def _bench_modules() -> dict[str, ModuleType]:
    found = {}
    for name in BENCH_MODULES:
        try:
            found[name] = importlib.import_module(f"rolewatch.bench.{name}")
        except ImportError:
            continue
    return found


def cmd_bench(args) -> int:
    """Run one benchmark case (or every case of a module, or ``all``): one JSON line each."""
    modules = _bench_modules()
    plan: list[tuple[ModuleType, str]] = []
    wanted = args.case.replace("-", "_")
    for name, module in modules.items():
        cases = tuple(getattr(module, "CASES", ()))
        if (
            args.case == "all"
            or wanted == name
            or (wanted == "engine" and name.startswith("engine"))
        ):
            plan.extend((module, case) for case in cases)
        elif args.case in cases:
            plan.append((module, args.case))
    if not plan:
        known = sorted({c for m in modules.values() for c in getattr(m, "CASES", ())})
        raise UsageError(
            f"unknown bench case {args.case!r}; choose one of: all, "
            + ", ".join(sorted(modules))
            + ", "
            + ", ".join(known)
        )
    for module, case in plan:
        run = module.run
        kwargs = (
            {"quick": True} if args.quick and "quick" in inspect.signature(run).parameters else {}
        )
        for record in run(case, **kwargs):
            print(json.dumps(record), flush=True)
    return 0


# --- demo / evaluate (other modules) ----------------------------------------------------------


def _delegate(module_name: str):
    def command(args) -> int:
        module = importlib.import_module(module_name)
        outcome = module.main(args)
        return int(outcome or 0)

    return command


# --- parser ----------------------------------------------------------------------------------


def _add_serve(sub: Any, common: argparse.ArgumentParser) -> None:
    serve = sub.add_parser("serve", parents=[common], help="run the HTTP service")
    serve.add_argument("--host", help="address to bind (default: setting host)")
    serve.add_argument("--port", type=int, help="port to listen on (default: setting port)")
    serve.add_argument(
        "--role",
        choices=("all", "api", "worker"),
        help="all: API and jobs; api: HTTP only; worker: jobs (and health)",
    )
    serve.set_defaults(handler=cmd_serve)


def _add_keys(sub: Any, common: argparse.ArgumentParser) -> None:
    keys = sub.add_parser("keys", parents=[common], help="manage API keys")
    keys_sub = keys.add_subparsers(dest="keys_command", metavar="ACTION", required=True)
    create = keys_sub.add_parser("create", parents=[common], help="make a key; prints only the key")
    create.add_argument(
        "--scope",
        action="append",
        required=True,
        choices=("ingest", "read", "review", "admin"),
        help="a scope the key gets (repeat for several; admin implies the others, review "
        "implies read)",
    )
    create.add_argument("--label", help="a note saying who or what uses the key")
    create.add_argument("--name", help="the display name reviewers see on cases")
    keys_sub.add_parser(
        "list", parents=[common], help="list keys (id, scopes, state, created, label, name)"
    )
    revoke = keys_sub.add_parser("revoke", parents=[common], help="revoke a key by its id")
    revoke.add_argument("key_id", metavar="KEY_ID")
    name = keys_sub.add_parser(
        "name", parents=[common], help="set the display name of a key (empty clears it)"
    )
    name.add_argument("key_id", metavar="KEY_ID")
    name.add_argument("name", metavar="NAME")
    keys.set_defaults(handler=cmd_keys)


def _add_replay(sub: Any, common: argparse.ArgumentParser) -> None:
    replay = sub.add_parser(
        "replay", parents=[common], help="feed a file of events, then close windows"
    )
    replay.add_argument("file", metavar="FILE")
    replay.add_argument(
        "--format",
        choices=("ndjson", "csv"),
        help="file format (default: csv for *.csv, else ndjson)",
    )
    replay.add_argument(
        "--batch-size", type=int, help="events per ingest transaction (default 5000)"
    )
    replay.add_argument("--no-close", action="store_true", help="only store the events")
    replay.add_argument(
        "--to-archive",
        nargs="?",
        const="",
        metavar="PATH",
        help="write the events to the Parquet event archive at PATH (default: event_archive) "
        "instead of the store; needs the [scale] extra",
    )
    replay.add_argument("--no-progress", action="store_true", help="no progress bar")
    replay.set_defaults(handler=cmd_replay)


def _add_bench_demo_evaluate(sub: Any, common: argparse.ArgumentParser) -> None:
    bench = sub.add_parser(
        "bench", parents=[common], help="run a benchmark; one JSON object per line"
    )
    bench.add_argument(
        "case", metavar="CASE", help="a case name, a module (ingest, history, engine) or all"
    )
    bench.add_argument("--quick", action="store_true", help="smaller sizes, for a smoke run")
    bench.set_defaults(handler=cmd_bench)

    demo = sub.add_parser("demo", parents=[common], help="run the demo scenario")
    demo.set_defaults(rest=[])
    demo.set_defaults(handler=_delegate("rolewatch.scenario.demo"))
    evaluate = sub.add_parser(
        "evaluate", parents=[common], help="evaluate detection on the scenario"
    )
    evaluate.set_defaults(rest=[])
    evaluate.set_defaults(handler=_delegate("rolewatch.scenario.evaluate"))


def build_parser() -> argparse.ArgumentParser:
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument(
        "--config",
        metavar="FILE",
        default=argparse.SUPPRESS,
        help="TOML file of settings (also ROLEWATCH_CONFIG)",
    )
    parser = argparse.ArgumentParser(
        prog="rolewatch",
        parents=[common],
        description="Streaming detection of structural role changes in an interaction graph.",
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for add in (_add_serve, _add_keys, _add_replay, _add_bench_demo_evaluate):
        add(sub, common)
    return parser


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``rolewatch`` script; returns the exit code."""
    from rolewatch.config import ConfigError

    parser = build_parser()
    # argparse exits 2 with its own message on usage errors. demo and evaluate parse their
    # own options, so whatever the main parser does not know is passed on to them.
    args, unknown = parser.parse_known_args(argv)
    if unknown:
        if args.command in ("demo", "evaluate"):
            args.rest = list(getattr(args, "rest", None) or []) + unknown
        else:
            parser.error(f"unrecognized arguments: {' '.join(unknown)}")
    try:
        return args.handler(args)
    except (ConfigError, UsageError) as error:
        print(f"rolewatch: {error}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("rolewatch: interrupted", file=sys.stderr)
        return 1
    except Exception as error:  # anything else: exit 1 with the reason
        if os.environ.get("ROLEWATCH_DEBUG"):
            raise
        print(f"rolewatch: error: {type(error).__name__}: {error}", file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())
