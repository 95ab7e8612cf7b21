"""Service configuration: every option from ``ROLEWATCH_*`` environment variables or a TOML file.

Precedence, highest first: explicit keyword arguments, environment variables, the TOML file
named by ``--config`` (or ``ROLEWATCH_CONFIG``), the defaults written here. Durations are
written like ``7d``, ``12h``, ``30m``, ``45s`` (or a plain number of seconds).
"""

from __future__ import annotations

import re
from datetime import timedelta
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import BeforeValidator, Field, PlainSerializer, field_validator, model_validator
from pydantic_settings import (
    BaseSettings,
    PydanticBaseSettingsSource,
    SettingsConfigDict,
    TomlConfigSettingsSource,
)

_DURATION = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*(ms|s|m|h|d|w)?\s*$")
_UNIT_SECONDS = {"ms": 0.001, "s": 1, "m": 60, "h": 3600, "d": 86400, "w": 604800, None: 1}


def parse_duration(value: Any) -> timedelta:
    """Turn ``"7d"``, ``"12h"``, ``"30m"``, ``"45s"``, ``"250ms"`` or seconds into a timedelta."""
    if isinstance(value, timedelta):
        return value
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return timedelta(seconds=float(value))
    if isinstance(value, str):
        match = _DURATION.match(value)
        if match:
            number, unit = match.groups()
            return timedelta(seconds=float(number) * _UNIT_SECONDS[unit])
    raise ValueError(
        f"{value!r} is not a duration: write a number with a unit, like 7d, 12h, 30m, 45s or 250ms"
    )


def format_duration(value: timedelta) -> str:
    """Write a timedelta back in the shortest exact unit (``604800 s`` → ``"7d"``)."""
    seconds = value.total_seconds()
    for unit in ("w", "d", "h", "m", "s"):
        size = _UNIT_SECONDS[unit]
        if seconds >= size and seconds % size == 0:
            return f"{int(seconds // size)}{unit}"
    return f"{int(round(seconds * 1000))}ms"


Duration = Annotated[
    timedelta,
    BeforeValidator(parse_duration),
    PlainSerializer(format_duration, return_type=str),
]


def written_duration(text: str) -> Any:
    """A duration setting's default as an operator writes it (``"7d"``): pydantic parses it
    when settings load (``validate_default``), and the README's settings table shows it as
    written. Typed ``Any`` because the field's type is the parsed ``timedelta``."""
    return text


class Settings(BaseSettings):
    """All rolewatch options. Each one can be set as ``ROLEWATCH_<NAME>`` or in the TOML file."""

    model_config = SettingsConfigDict(
        env_prefix="ROLEWATCH_",
        extra="forbid",
        validate_default=True,
        toml_file=None,
    )

    # --- storage -----------------------------------------------------------------------
    database_url: str = Field(
        "sqlite:///rolewatch.db",
        description="SQLAlchemy URL of the store: sqlite:///path.db (default) or "
        "postgresql+psycopg://user@host:5432/db (window closes also read events through "
        "libpq with it, so query parameters must be libpq connection parameters).",
    )
    sqlite_synchronous: Literal["FULL", "NORMAL"] = Field(
        "FULL",
        description="SQLite durability: FULL syncs every commit, so an acknowledged event "
        "survives power loss; NORMAL is faster and survives a process crash but may lose the "
        "last commits on power loss.",
    )
    sqlite_busy_timeout: Duration = Field(
        written_duration("30s"),
        description="How long a SQLite writer waits for a lock before failing.",
    )

    # --- HTTP --------------------------------------------------------------------------
    host: str = Field("127.0.0.1", description="Address the HTTP server binds to.")
    port: int = Field(8000, ge=0, le=65535, description="Port the HTTP server listens on.")
    public_url: str = Field(
        "http://127.0.0.1:8000",
        description="Base URL people use to reach this service; alert links point here.",
    )
    metrics_public: bool = Field(
        False,
        description="Serve GET /metrics without an API key (for a scraper on a private "
        "network); by default it needs a key with the read scope.",
    )
    max_body_bytes: int = Field(
        65_536,
        ge=1024,
        description="Largest request body of every route but POST /v1/events, in bytes; a "
        "larger Content-Length is refused before any of the body is read.",
    )
    http_header_timeout: Duration = Field(
        written_duration("10s"),
        description="A connection whose request head (line and headers) is not complete this "
        "long after it began is closed.",
    )
    http_body_timeout: Duration = Field(
        written_duration("30s"),
        description="A request body that stops arriving for this long is refused (408) and "
        "its connection closed.",
    )
    session_lifetime: Duration = Field(
        written_duration("12h"),
        description="How long a web sign-in lasts; signing out or revoking the key ends it sooner.",
    )
    role: Literal["all", "api", "worker"] = Field(
        "all",
        description="What this process runs: all (API and background jobs), api (HTTP only) "
        "or worker (window closing and delivery only).",
    )

    # --- ingest ------------------------------------------------------------------------
    max_batch_events: int = Field(
        10_000, ge=1, description="Largest number of events one POST /v1/events may carry."
    )
    max_batch_bytes: int = Field(
        10_000_000, ge=1024, description="Largest request body of POST /v1/events, in bytes."
    )
    max_future_skew: Duration = Field(
        written_duration("5m"),
        description="Events stamped further than this into the future (by this server's clock) "
        "are rejected one by one.",
    )
    max_event_age: Duration = Field(
        written_duration("365d"),
        description="Events older than this (by this server's clock) are rejected one by one; "
        "0 accepts any age. Times before 1970-01-01T00:00:00Z are always rejected. Raise it "
        "to replay older history.",
    )

    # --- windows -----------------------------------------------------------------------
    window_period: Duration = Field(
        written_duration("7d"),
        description="How often a window closes; windows are aligned to UTC epoch multiples.",
    )
    window_span: Duration = Field(
        written_duration("7d"),
        description="How much history one snapshot covers (≥ period; > period = hopping).",
    )
    window_lateness: Duration = Field(
        written_duration("1h"),
        description="How long after a window's end to wait for stragglers before closing it.",
    )
    idle_close_after: Duration = Field(
        written_duration("10m"),
        description="With no event received for this long, windows whose end plus lateness has "
        "passed on the wall clock close even though no newer event moved the watermark.",
    )
    tick_interval: Duration = Field(
        written_duration("10s"), description="How often the background jobs run."
    )

    # --- features and roles ------------------------------------------------------------
    training_windows: int = Field(
        4, ge=1, description="Closed windows used to fit the feature recipe and role basis."
    )
    feature_rounds: int = Field(3, ge=0, description="Maximum ReFeX recursive rounds.")
    bin_fraction: float = Field(
        0.5, gt=0, lt=1, description="ReFeX vertical logarithmic binning fraction p."
    )
    prune_tolerance: float = Field(
        1.0,
        ge=0,
        description="ReFeX pruning tolerance s on binned values in the base round: features "
        "whose bins differ by at most s on every node count as one.",
    )
    prune_tolerance_step: float = Field(
        1.0,
        ge=0,
        description="Added to the pruning tolerance at each recursive round, so deeper rounds "
        "keep only features that say something new.",
    )
    binning: Literal["frozen", "relative"] = Field(
        "frozen",
        description="frozen: bin edges learnt on the training windows; relative: each window "
        "binned by its own quantiles (compute = local only).",
    )
    roles: int | None = Field(
        None,
        ge=1,
        description="Number of roles; empty chooses it by description length among the "
        "reproducible numbers of roles (docs/roles.md).",
    )
    roles_min: int = Field(2, ge=1, description="Smallest number of roles the selection considers.")
    roles_max: int = Field(12, ge=1, description="Largest number of roles the selection considers.")
    training_sample_accounts: int | None = Field(
        500_000,
        ge=10,
        description="Most accounts training fits the feature bins, the pruning, the role "
        "basis and the role descriptions on: a seeded sample (by a hash of the account id) "
        "when the training windows hold more; every account's features still come from the "
        "whole graph. Empty uses all accounts.",
    )
    roles_sample_rows: int | None = Field(
        4000,
        ge=100,
        description="Training accounts (a seeded sample) the candidate numbers of roles are "
        "compared on; the chosen number is then fitted on all. Empty uses all accounts.",
    )
    roles_stability_min: float = Field(
        0.90,
        gt=0,
        le=1,
        description="Smallest agreement of role profiles (1 - median Hellinger distance of the "
        "matched roles) across fits on 90% resamples of the accounts for a number of "
        "roles to count as reproducible.",
    )
    roles_mdl_tolerance: float = Field(
        0.10,
        ge=0,
        lt=1,
        description="Among reproducible numbers of roles, the smallest whose description "
        "length is within this share of the least is chosen (closer lengths are a tie).",
    )
    roles_resamples: int = Field(
        5, ge=2, description="Resampled fits per candidate number of roles (stability)."
    )
    seed: int = Field(0, description="Seed for the factorisation, so fits are repeatable.")

    # --- scoring and alerts ------------------------------------------------------------
    shift_measure: Literal[
        "role_aware", "hellinger", "jensen_shannon", "total_variation", "cosine"
    ] = Field(
        "role_aware", description="Distance between an account's baseline and current mixture."
    )
    shift_baseline: Literal["previous", "mean", "ewm"] = Field(
        "previous",
        description="Baseline mixture: the previous active window, the mean of the last "
        "baseline_windows, or an exponentially weighted mean.",
    )
    baseline_windows: int = Field(4, ge=1, description="Windows the mean baseline averages.")
    baseline_half_life: float = Field(
        2.0, gt=0, description="Half-life, in windows, of the exponentially weighted baseline."
    )
    alert_mode: Literal["threshold", "budget"] = Field(
        "budget",
        description="threshold: alert when the score reaches alert_threshold; budget: alert on "
        "the top alert_budget share of scored accounts whose score reaches alert_floor. "
        "Scores are z-scores of the account's change against its own past "
        "(docs/detection.md explains them and the defaults).",
    )
    alert_threshold: float = Field(5.0, ge=0, description="Score an alert needs (threshold mode).")
    alert_budget: float = Field(
        0.01, gt=0, le=1, description="Share of active accounts alerted per window (budget mode)."
    )
    alert_floor: float = Field(3.5, ge=0, description="Lowest score alerted in budget mode.")
    min_events: int = Field(
        1, ge=0, description="Events an account needs in both windows before it is scored."
    )
    novelty_windows: int = Field(
        8,
        ge=1,
        description="Earlier active windows an account's usual rate of meeting new "
        "counterparts is estimated from.",
    )
    tie_smoothing: float = Field(
        2.0,
        ge=0,
        description="Pseudo-counts added to an account's baseline window when the shares of "
        "its ties (known/new, sent/received) are compared with this window's.",
    )
    bridge_resolution: float = Field(
        0.2,
        ge=0,
        description="Resolution of the Leiden communities the bridging component uses (lower: "
        "fewer, larger communities); 0 turns bridging off.",
    )

    # --- delivery ----------------------------------------------------------------------
    webhook_allow_http: bool = Field(
        False, description="Allow plain http:// subscription URLs (https is required otherwise)."
    )
    webhook_allow_hosts: list[str] = Field(
        default_factory=list,
        description="Hosts, addresses or CIDR ranges that subscriptions may reach even though "
        "they are private or loopback (for receivers inside your network).",
    )
    delivery_max_attempts: int = Field(
        12, ge=1, description="Attempts before a delivery is marked failed."
    )
    delivery_backoff: Duration = Field(
        written_duration("30s"),
        description="First retry delay; doubles each attempt, with jitter, capped at 6h.",
    )
    delivery_connect_timeout: Duration = Field(
        written_duration("5s"), description="Webhook connect timeout."
    )
    delivery_timeout: Duration = Field(
        written_duration("15s"), description="Webhook total request timeout."
    )
    subscription_pause_after: int = Field(
        20, ge=1, description="Consecutive failed attempts after which a subscription is paused."
    )
    secret_overlap: Duration = Field(
        written_duration("24h"),
        description="How long a rotated-out signing secret keeps signing beside the new one.",
    )
    delivery_batch_size: int = Field(
        50, ge=1, description="Most deliveries one worker run claims and sends."
    )
    delivery_concurrency: int = Field(
        4, ge=1, description="Webhook requests one worker run sends at the same time."
    )
    delivery_ca_bundle: str | None = Field(
        None,
        description="PEM file of certificate authorities trusted for https webhooks, for "
        "receivers behind an internal CA (empty: the system's trusted authorities).",
    )

    # --- review (cases and suppressions) -----------------------------------------------
    case_group_windows: int = Field(
        4,
        ge=1,
        description="A new alert joins its account's latest case when that case's newest alert "
        "is at most this many windows (window_period) older; otherwise it opens a new case.",
    )
    case_reopen_ratio: float = Field(
        1.5,
        ge=1,
        description="A new alert reopens a dismissed case only when its score is at least this "
        "multiple of the highest score the case had when it was dismissed; a weaker alert joins "
        "the case and leaves it dismissed.",
    )
    suppression_default_expiry: Duration = Field(
        written_duration("90d"),
        description="How long a suppression lasts when it is made without an expiry date.",
    )

    # --- scale (optional extra [scale]: Dask and pyarrow; docs/scale.md) ---------------
    event_source: Literal["store", "archive"] = Field(
        "store",
        description="Where a window close reads its events: the SQL store, or the Parquet "
        "event archive (event_archive) together with any events ingested into the store.",
    )
    event_archive: str | None = Field(
        None,
        description="Path or URL (anything pyarrow/fsspec opens) of the Parquet event archive, "
        "partitioned by window; needed when event_source is archive.",
    )
    archive_reader: Literal["workers", "closer"] = Field(
        "workers",
        description="Who reads a measured window's events from event_archive when compute is "
        "dask: the Dask workers (they need read access to the archive's storage; the closing "
        "process then never holds the events), or the closing process, which sends them to "
        "the workers.",
    )
    compute: Literal["local", "dask"] = Field(
        "local",
        description="Where a window's features and memberships are computed: in this process, "
        "or on a Dask cluster (dask_scheduler).",
    )
    dask_scheduler: str | None = Field(
        None,
        description="Address of the Dask scheduler, like tcp://10.0.0.5:8786 (empty with "
        "compute = dask: a local cluster is started inside this process).",
    )
    output_archive: str | None = Field(
        None,
        description="Path or URL of a Parquet dataset, partitioned by window, that every "
        "closed window's memberships and scores, and its first-seen account pairs, are also "
        "written to (empty: none); a Dask close then reads the known pairs there on the "
        "workers.",
    )
    store_memberships_max_accounts: int = Field(
        0,
        ge=0,
        description="A window with more accounts than this keeps its memberships and scores "
        "only in output_archive, not in the SQL store (which still gets the window, its alerts "
        "and their evidence); 0 stores every window's memberships.",
    )
    close_scratch_dir: str | None = Field(
        None,
        description="Directory on the closing machine's local disk where a window of at least "
        "1,000,000 events keeps its event ids during its close, memory-mapped, instead of in "
        "memory (the file is unlinked at once; its space returns when the close ends); empty: "
        "the system's temporary directory (TMPDIR). A memory-backed directory (tmpfs) saves "
        "nothing.",
    )
    dask_partitions: int = Field(
        64,
        ge=1,
        description="Most partitions the Dask close splits a window's accounts into (the "
        "close uses about one per 250,000 accounts, at least one per worker).",
    )

    # --- retention and logging ---------------------------------------------------------
    retention_windows: int = Field(
        0,
        ge=0,
        description="Purge raw events older than this many closed windows (0 keeps them all). "
        "Memberships and alerts are kept.",
    )
    log_level: Literal["DEBUG", "INFO", "WARNING", "ERROR"] = Field(
        "INFO", description="Log level."
    )
    log_json: bool = Field(True, description="Write logs as JSON lines (false: plain text).")

    @field_validator("database_url")
    @classmethod
    def _known_database(cls, url: str) -> str:
        if not url.startswith(("sqlite:", "postgresql")):
            raise ValueError("database_url must start with sqlite:/// or postgresql+psycopg://")
        return url

    @field_validator("delivery_ca_bundle")
    @classmethod
    def _readable_ca_bundle(cls, path: str | None) -> str | None:
        if path and not Path(path).is_file():
            raise ValueError(f"{path} is not a file: name a PEM file of certificate authorities")
        return path or None

    @field_validator("close_scratch_dir")
    @classmethod
    def _existing_scratch_dir(cls, path: str | None) -> str | None:
        if path and not Path(path).is_dir():
            raise ValueError(
                f"close_scratch_dir {path} is not a directory: create it on a local disk, or "
                "leave it empty for the system's temporary directory"
            )
        return path or None

    @model_validator(mode="after")
    def _coherent(self) -> Settings:
        if self.window_span < self.window_period:
            raise ValueError("window_span must be at least window_period")
        if self.window_period.total_seconds() < 1:
            raise ValueError("window_period must be at least 1s")
        if self.roles_min > self.roles_max:
            raise ValueError("roles_min must not exceed roles_max")
        if self.event_source == "archive" and not self.event_archive:
            raise ValueError(
                "event_source = archive needs event_archive: set ROLEWATCH_EVENT_ARCHIVE to the "
                "archive's path or URL"
            )
        if self.store_memberships_max_accounts and not self.output_archive:
            raise ValueError(
                "store_memberships_max_accounts keeps large windows' memberships only in the "
                "Parquet outputs: set ROLEWATCH_OUTPUT_ARCHIVE to their path or URL, or set "
                "store_memberships_max_accounts to 0"
            )
        if self.compute == "dask" and self.binning == "relative":
            raise ValueError(
                "compute = dask bins every window with the bin edges frozen at training: set "
                "binning = frozen (ROLEWATCH_BINNING), or compute = local for relative binning"
            )
        return self

    @classmethod
    def settings_customise_sources(
        cls,
        settings_cls: type[BaseSettings],
        init_settings: PydanticBaseSettingsSource,
        env_settings: PydanticBaseSettingsSource,
        dotenv_settings: PydanticBaseSettingsSource,
        file_secret_settings: PydanticBaseSettingsSource,
    ) -> tuple[PydanticBaseSettingsSource, ...]:
        toml_path = settings_cls.model_config.get("toml_file")
        sources: list[PydanticBaseSettingsSource] = [init_settings, env_settings]
        if toml_path:
            sources.append(TomlConfigSettingsSource(settings_cls, toml_file=toml_path))
        return tuple(sources)


class ConfigError(Exception):
    """A setting is missing or wrong; the message says which one and how to fix it."""


def load_settings(config_file: str | Path | None = None, **overrides: Any) -> Settings:
    """Read settings from the environment and an optional TOML file.

    Raises ``ConfigError`` with a readable message (the CLI turns it into exit code 2).
    """
    import os

    from pydantic import ValidationError

    path = config_file or os.environ.get("ROLEWATCH_CONFIG")
    if path is not None and not Path(path).is_file():
        raise ConfigError(f"config file {path} does not exist: check the --config path")

    class _FromFile(Settings):
        model_config = SettingsConfigDict(toml_file=str(path) if path else None)

    try:
        loaded = _FromFile(**overrides)
    except ValidationError as error:
        lines = []
        for problem in error.errors():
            name = ".".join(str(part) for part in problem["loc"]) or "settings"
            lines.append(f"{name} (ROLEWATCH_{name.upper()}): {problem['msg']}")
        raise ConfigError("invalid configuration:\n  " + "\n  ".join(lines)) from None
    except Exception as error:  # a TOML syntax error, for example
        raise ConfigError(f"cannot read configuration: {error}") from None
    return Settings.model_validate(loaded.model_dump())


def describe_settings() -> list[tuple[str, str, str]]:
    """(env variable, default, help) for every option: used to write the README's table."""
    rows = []
    for name, field in Settings.model_fields.items():
        default = field.get_default(call_default_factory=True)
        if isinstance(default, timedelta):
            default = format_duration(default)
        rows.append((f"ROLEWATCH_{name.upper()}", repr(default), field.description or ""))
    return rows
