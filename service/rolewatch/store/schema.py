"""The store's tables, as SQLAlchemy Core metadata shared by SQLite and PostgreSQL.

Times are integer microseconds since the Unix epoch, UTC (columns ending in ``_us``), so range
queries are plain integer comparisons on both databases. JSON documents (recipes, bases,
mixtures, evidence, payloads) are stored as text: both databases handle it the same way and
the service never queries inside them.
"""

from __future__ import annotations

from sqlalchemy import (
    BigInteger,
    Boolean,
    Column,
    Float,
    ForeignKey,
    Index,
    Integer,
    LargeBinary,
    MetaData,
    String,
    Table,
    Text,
    UniqueConstraint,
)

metadata = MetaData(
    naming_convention={
        "ix": "ix_%(table_name)s_%(column_0_N_name)s",
        "uq": "uq_%(table_name)s_%(column_0_N_name)s",
        "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
        "pk": "pk_%(table_name)s",
        "ck": "ck_%(table_name)s_%(constraint_name)s",
    }
)

ID = BigInteger().with_variant(Integer, "sqlite")  # SQLite autoincrements INTEGER PRIMARY KEY

# Event field limits, in characters: the widths of these columns, checked on every event by
# ingest (store.events) and published in the wire schema (api.models.Event).
MAX_ID_CHARS = 200
MAX_ACCOUNT_CHARS = 200
MAX_KIND_CHARS = 64

events = Table(
    "events",
    metadata,
    Column("seq", ID, primary_key=True, autoincrement=True),
    Column("event_id", String(MAX_ID_CHARS), nullable=False, unique=True),
    Column("time_us", BigInteger, nullable=False),
    Column("actor", String(MAX_ACCOUNT_CHARS), nullable=False),
    Column("target", String(MAX_ACCOUNT_CHARS), nullable=False),
    Column("kind", String(MAX_KIND_CHARS), nullable=True),
    Column("weight", Float, nullable=False),
    Column("received_us", BigInteger, nullable=False),
    # True when the event's window had already closed when it arrived: stored and counted,
    # never folded into the closed window.
    Column("late", Boolean, nullable=False, default=False),
    Index("ix_events_time_us", "time_us"),
)

windows = Table(
    "windows",
    metadata,
    Column("id", ID, primary_key=True, autoincrement=True),
    # The window covers events with start_us <= time < end_us; end - start = span.
    Column("start_us", BigInteger, nullable=False),
    Column("end_us", BigInteger, nullable=False, unique=True),
    Column("status", String(16), nullable=False),  # closed (only closed windows are stored)
    Column("closed_us", BigInteger, nullable=False),
    Column("event_count", Integer, nullable=False, default=0),
    Column("account_count", Integer, nullable=False, default=0),
    Column("late_count", Integer, nullable=False, default=0),
    Column("alert_count", Integer, nullable=False, default=0),
    Column("new_count", Integer, nullable=False, default=0),  # accounts with no baseline
    Column("inactive_count", Integer, nullable=False, default=0),  # active before, not now
    Column("scored_count", Integer, nullable=False, default=0),
    Column("training", Boolean, nullable=False, default=False),
    Column("recipe_version", String(64), nullable=True),
    Column("basis_version", String(64), nullable=True),
    # Mean relative reconstruction error of the population: a rising value means the
    # frozen basis no longer explains behaviour well (stale basis).
    Column("reconstruction_error", Float, nullable=True),
    Column("close_seconds", Float, nullable=True),
    # JSON {stage: seconds} of the close (pipeline.stages.STAGES); null before it was kept
    Column("stage_seconds", Text, nullable=True),
)

recipes = Table(
    "recipes",
    metadata,
    Column("version", String(64), primary_key=True),
    Column("created_us", BigInteger, nullable=False),
    Column("body", Text, nullable=False),  # FeatureRecipe.to_dict() as JSON
)

bases = Table(
    "bases",
    metadata,
    Column("version", String(64), primary_key=True),
    Column("recipe_version", String(64), ForeignKey("recipes.version"), nullable=False),
    Column("created_us", BigInteger, nullable=False),
    Column("active", Boolean, nullable=False, default=False),
    Column("trained_from_us", BigInteger, nullable=False),
    Column("trained_to_us", BigInteger, nullable=False),
    Column("body", Text, nullable=False),  # RoleBasis.to_dict() as JSON
)

roles = Table(
    "roles",
    metadata,
    Column("basis_version", String(64), ForeignKey("bases.version"), primary_key=True),
    Column("role_id", Integer, primary_key=True),
    Column("name", String(100), nullable=False),
    Column("description", Text, nullable=False),
    Column("profile", Text, nullable=False),  # JSON {feature: weight} and measure affinities
)

memberships = Table(
    "memberships",
    metadata,
    Column("account", String(MAX_ACCOUNT_CHARS), primary_key=True),
    Column("window_id", BigInteger, ForeignKey("windows.id"), primary_key=True),
    Column("basis_version", String(64), nullable=False),
    Column("mixture", Text, nullable=False),  # JSON {role_id: weight}, sums to 1
    # null when the account had too little activity to fit a role (status too_little)
    Column("dominant_role", Integer, nullable=True),
    Column("score", Float, nullable=True),  # null on first appearance / not scored
    # new | scored | low_activity | too_little
    Column("status", String(16), nullable=False),
    Column("events_out", Integer, nullable=False),
    Column("events_in", Integer, nullable=False),
    Column("counterparts", Integer, nullable=False),
    Column("new_counterparts", Integer, nullable=False),  # new over the known history
    Column("error", Float, nullable=False),  # relative reconstruction error
    # distinct counterparts sent to / received from, known before or new (null: measured
    # before these columns existed)
    Column("ties_out_known", Integer, nullable=True),
    Column("ties_out_new", Integer, nullable=True),
    Column("ties_in_known", Integer, nullable=True),
    Column("ties_in_new", Integer, nullable=True),
    Column("community", Integer, nullable=True),  # community in this window (bridging)
    Index("ix_memberships_window_id", "window_id"),
)

# The known-pair history: per window, the 64-bit keys of the account pairs that interacted
# there for the first time (engine.pairs), sorted, as little-endian uint64 bytes.
pair_history = Table(
    "pair_history",
    metadata,
    Column("window_id", BigInteger, ForeignKey("windows.id"), primary_key=True),
    Column("pair_count", Integer, nullable=False),
    Column("pairs", LargeBinary, nullable=False),
)

alerts = Table(
    "alerts",
    metadata,
    Column("id", ID, primary_key=True, autoincrement=True),
    Column("window_id", BigInteger, ForeignKey("windows.id"), nullable=False),
    Column("account", String(MAX_ACCOUNT_CHARS), nullable=False),
    Column("created_us", BigInteger, nullable=False),
    Column("window_end_us", BigInteger, nullable=False),
    Column("score", Float, nullable=False),
    Column("basis_version", String(64), nullable=False),
    Column("role_before", Integer, nullable=True),
    Column("role_after", Integer, nullable=False),
    Column("evidence", Text, nullable=False),  # JSON, see docs/CONTRACTS.md "Alert"
    UniqueConstraint("window_id", "account"),
    Index("ix_alerts_account", "account"),
    Index("ix_alerts_window_end_us", "window_end_us"),
    Index("ix_alerts_score", "score"),
)

api_keys = Table(
    "api_keys",
    metadata,
    Column("id", ID, primary_key=True, autoincrement=True),
    Column("key_id", String(32), nullable=False, unique=True),  # public part, shown in lists
    Column("secret_hash", String(128), nullable=False),  # sha256 of the whole key
    Column("scopes", String(100), nullable=False),  # space-separated: ingest read admin
    Column("label", String(200), nullable=True),
    Column("created_us", BigInteger, nullable=False),
    Column("revoked_us", BigInteger, nullable=True),
    Column("display_name", String(100), nullable=True),  # the reviewer's name on cases
)

subscriptions = Table(
    "subscriptions",
    metadata,
    Column("id", String(40), primary_key=True),
    Column("url", Text, nullable=False),
    Column("format", String(16), nullable=False),  # json | text
    Column("min_score", Float, nullable=False, default=0.0),
    Column("roles", Text, nullable=True),  # JSON list of role ids (new dominant role filter)
    Column("secret", String(200), nullable=False),  # whsec_..., needed to sign
    Column("previous_secret", String(200), nullable=True),
    Column("previous_secret_until_us", BigInteger, nullable=True),
    Column("created_us", BigInteger, nullable=False),
    Column("paused", Boolean, nullable=False, default=False),
    Column("paused_reason", Text, nullable=True),
    Column("consecutive_failures", Integer, nullable=False, default=0),
    Column("deleted_us", BigInteger, nullable=True),
    # JSON list of the event types sent (alert.raised, case.updated); null: alert.raised only
    Column("event_types", Text, nullable=True),
)

deliveries = Table(
    "deliveries",
    metadata,
    Column("id", String(64), primary_key=True),  # the webhook-id, reused on every retry
    Column("subscription_id", String(40), ForeignKey("subscriptions.id"), nullable=False),
    Column("alert_id", BigInteger, ForeignKey("alerts.id"), nullable=True),  # null for tests
    Column("event_type", String(64), nullable=False),  # alert.raised | alert.test
    Column("body", Text, nullable=False),  # exact bytes signed and sent, fixed at creation
    Column("status", String(16), nullable=False),  # pending | delivered | failed
    Column("attempts", Integer, nullable=False, default=0),
    Column("next_attempt_us", BigInteger, nullable=False),
    Column("created_us", BigInteger, nullable=False),
    Column("delivered_us", BigInteger, nullable=True),
    Column("last_status_code", Integer, nullable=True),
    Column("last_error", Text, nullable=True),
    Index("ix_deliveries_status_next_attempt_us", "status", "next_attempt_us"),
    Index("ix_deliveries_subscription_id", "subscription_id"),
)

delivery_attempts = Table(
    "delivery_attempts",
    metadata,
    Column("id", ID, primary_key=True, autoincrement=True),
    Column("delivery_id", String(64), ForeignKey("deliveries.id"), nullable=False),
    Column("attempted_us", BigInteger, nullable=False),
    Column("status_code", Integer, nullable=True),
    Column("error", Text, nullable=True),  # short: never a secret, at most a body snippet
    Column("duration_ms", Float, nullable=True),
    Index("ix_delivery_attempts_delivery_id", "delivery_id"),
)

service_state = Table(
    "service_state",
    metadata,
    Column("key", String(64), primary_key=True),
    Column("value", Text, nullable=False),
)

# Web sign-in sessions: the browser's cookie holds a random token; only its sha256 is stored.
# A session ends when it expires, when the person signs out (ended_us), or when its key is
# revoked (the key is checked on every request).
web_sessions = Table(
    "web_sessions",
    metadata,
    Column("id", ID, primary_key=True, autoincrement=True),
    Column("token_hash", String(64), nullable=False, unique=True),
    Column("key_id", String(32), nullable=False),
    Column("created_us", BigInteger, nullable=False),
    Column("expires_us", BigInteger, nullable=False),
    Column("ended_us", BigInteger, nullable=True),
    Index("ix_web_sessions_expires_us", "expires_us"),
)


# The review tables (cases, their history, suppressions) live in their own module on this
# metadata; importing it here registers them for Alembic and create_all.
from rolewatch.store import review_schema as _review_schema  # noqa: E402,F401
