"""Typed configuration: one place that knows every key, its type, its default and its error.

The file is TOML (see DESIGN.md, "Configuration").  ``load_config`` validates it
with pydantic and turns every problem into a ``ConfigError`` whose message is one
sentence naming the key and the file.  Relative paths are resolved against the
directory of the configuration file.
"""

from __future__ import annotations

import codecs
import functools
import hashlib
import ipaddress
import os
import re
import tomllib
from datetime import datetime
from pathlib import Path
from typing import Annotated, Literal
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError, available_timezones

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    ValidationError,
    field_validator,
    model_validator,
)

from monitor.errors import UserError
from monitor.stats.design import cue_columns, dummy_name

ENV_VAR = "CUEWATCH_CONFIG"

# Cue names become column names in the store and keys in reports, so they must be
# plain identifiers that cannot collide with the store's own columns (the store's schema
# says which those are: monitor.store.rules.RESERVED_COLUMN_NAMES).
_NAME = re.compile(r"^[A-Za-z][A-Za-z0-9_]{0,62}$")


class ConfigError(UserError):
    """A user error in the configuration: one sentence naming the key and the file."""


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


def _check_timezone(value: str) -> str:
    # A name both Python's zoneinfo and the store's SQL engine (DuckDB's ICU) know: the
    # IANA names zoneinfo lists, less 'localtime' (the machine's own zone under another
    # name, which DuckDB refuses); file paths such as 'posix/...' load in zoneinfo only.
    try:
        ZoneInfo(value)
    except (ZoneInfoNotFoundError, ValueError) as exc:
        raise ValueError(f"unknown time zone {value!r}") from exc
    if value not in _iana_zones():
        raise ValueError(f"unknown time zone {value!r} (use an IANA name such as 'Europe/London')")
    return value


@functools.cache
def _iana_zones() -> frozenset[str]:
    return frozenset(available_timezones() - {"localtime"})


def _column_name(value: str | None) -> str | None:
    """A column name as files carry it: header names are trimmed when read, so a name
    that is empty or has spaces at its ends could never be found."""
    if value is not None and (not value.strip() or value != value.strip()):
        raise ValueError(f"column name {value!r} is empty or has spaces at its ends")
    return value


def _map_keys(values: dict[str, float]) -> dict[str, float]:
    """Keys of a text-to-number map (and categorical levels): values are trimmed before
    they are looked up, so a key that is empty or has spaces at its ends never matches."""
    for key in values:
        if not key.strip() or key != key.strip():
            raise ValueError(f"{key!r} is empty or has spaces at its ends")
    return values


class StoreConfig(_Strict):
    path: Path = Path("data/cuewatch.duckdb")
    lock_timeout_s: float = Field(30.0, ge=0)
    read_retry_s: float = Field(5.0, ge=0)
    # Permission bits of every file cuewatch creates (store, WAL, lock, alert file,
    # exports); folders get the same plus search (x) where read is allowed.
    file_mode: int = 0o600

    @field_validator("file_mode", mode="before")
    @classmethod
    def _octal_mode(cls, value: object) -> int:
        return parse_file_mode(value)


def parse_file_mode(value: object) -> int:
    """``store.file_mode`` as permission bits: an integer (TOML ``0o640``) or an octal
    string ("0640", "0o640", "640"); owner read and write required, no execute bits."""
    mode = value
    if isinstance(value, str):
        text = value.strip().lower().removeprefix("0o")
        if not re.fullmatch(r"0?[0-7]{3}", text):
            raise ValueError(f"file_mode must be octal permissions such as 0o600, not {value!r}")
        mode = int(text, 8)
    if isinstance(mode, bool) or not isinstance(mode, int) or not 0 <= mode <= 0o777:
        raise ValueError(f"file_mode must be octal permissions such as 0o600, not {value!r}")
    if mode & 0o600 != 0o600 or mode & 0o111:
        raise ValueError(
            f"file_mode {mode:#o} must give the owner read and write and nobody execute"
        )
    return mode


class PostgresSourceConfig(_Strict):
    """Where ``cuewatch ingest`` pulls one kind of record from a PostgreSQL database
    (``[decisions.from_postgres]`` / ``[outcomes.from_postgres]``; monitor.ingest.postgres).
    The rows must carry the columns the kind's section names, like a file would."""

    # The name of the environment variable holding the libpq connection string (URL or
    # key=value); the string itself, which may hold a password, never sits in the file.
    url_env: str
    # Exactly one of: a SELECT whose rows are the records, or a table (``schema.table``).
    query: str | None = None
    table: str | None = None
    # A column of the rows that grows with every new record (an identity column, an
    # insertion time): a pull takes the rows above the largest value already taken.
    watermark: str

    @field_validator("url_env")
    @classmethod
    def _env_name(cls, value: str) -> str:
        if not re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*", value):
            raise ValueError(f"url_env must be an environment variable name, not {value!r}")
        return value

    _watermark = field_validator("watermark")(_column_name)

    @model_validator(mode="after")
    def _one_source(self) -> PostgresSourceConfig:
        if (self.query is None) == (self.table is None):
            raise ValueError("give exactly one of query and table")
        if self.query is not None and not self.query.strip().rstrip(";").strip():
            raise ValueError("query is empty")
        if self.table is not None and not re.fullmatch(r"[^.\s]+(\.[^.\s]+)?", self.table):
            raise ValueError(f"table must be a name or schema.name, not {self.table!r}")
        return self


class LakeConfig(_Strict):
    """``[lake]``: the decision and outcome logs live in a data lake (Parquet datasets or
    tables of a Spark catalog) and ``cuewatch refit`` computes the bucket statistics on
    Apache Spark (monitor.lake); only the buckets travel back to the store."""

    # Each kind: a Parquet dataset (a file or folder: a local path, relative to this
    # file, or a URL such as s3a://... or hdfs://...) or a table of the Spark catalog.
    decisions: str | None = None
    decisions_table: str | None = None
    outcomes: str | None = None
    outcomes_table: str | None = None
    # A column of both datasets that grows with every row added (a load sequence number,
    # an ingestion time): a run reads the rows above the watermark of the last run.
    watermark: str
    # Spark's master: local[*] on this machine, spark://host:7077, yarn, k8s://...
    master: str = "local[*]"
    # Where rejected rows are written (one Parquet folder per kind and run); default
    # beside the input: <dataset>_quarantine.  Required for catalog tables.
    quarantine: str | None = None
    # Extra Spark settings (spark.executor.memory, spark.sql.shuffle.partitions, ...).
    spark_conf: dict[str, str] = Field(default_factory=dict)

    _watermark = field_validator("watermark")(_column_name)

    @model_validator(mode="after")
    def _sources(self) -> LakeConfig:
        if (self.decisions is None) == (self.decisions_table is None):
            raise ValueError("give exactly one of decisions and decisions_table")
        if self.outcomes is not None and self.outcomes_table is not None:
            raise ValueError("give at most one of outcomes and outcomes_table")
        tables = self.decisions_table is not None or self.outcomes_table is not None
        if tables and self.quarantine is None:
            raise ValueError("a catalog table has no folder beside it: set quarantine")
        return self

    def has_outcomes(self) -> bool:
        return self.outcomes is not None or self.outcomes_table is not None


class DecisionsConfig(_Strict):
    landing: Path | None = None
    id: str
    decided_at: str
    decision_maker: str
    team: str | None = None
    judgment: str
    judgment_range: tuple[float, float] | None = None
    judgment_values: dict[str, float] = Field(default_factory=dict)
    timezone: str = "UTC"
    # Optional column saying what a row does to a stored decision: empty = a new
    # decision, ``correct_value`` = replaces the stored one, ``retract_value`` =
    # withdraws it (monitor.ingest.corrections).
    change: str | None = None
    correct_value: str = "correct"
    retract_value: str = "retract"
    from_postgres: PostgresSourceConfig | None = None

    _tz = field_validator("timezone")(_check_timezone)
    _columns = field_validator("id", "decided_at", "decision_maker", "team", "judgment", "change")(
        _column_name
    )
    _keys = field_validator("judgment_values")(_map_keys)

    @model_validator(mode="after")
    def _range_ordered(self) -> DecisionsConfig:
        if self.judgment_range and self.judgment_range[0] > self.judgment_range[1]:
            raise ValueError("judgment_range must be [low, high] with low <= high")
        _map_keys({self.correct_value: 0, self.retract_value: 0})
        if self.correct_value == self.retract_value:
            raise ValueError("correct_value and retract_value must differ")
        return self


class OutcomesConfig(_Strict):
    landing: Path | None = None
    id: str
    observed_at: str
    criterion: str
    criterion_values: dict[str, float] = Field(default_factory=dict)
    criterion_range: tuple[float, float] | None = None
    timezone: str | None = None
    from_postgres: PostgresSourceConfig | None = None

    _tz = field_validator("timezone")(lambda v: v if v is None else _check_timezone(v))
    _columns = field_validator("id", "observed_at", "criterion")(_column_name)
    _keys = field_validator("criterion_values")(_map_keys)


class CueConfig(_Strict):
    column: str | None = None
    type: Literal["numeric", "binary", "categorical"]
    unit: str | None = None
    range: tuple[float, float] | None = None
    values: dict[str, float] = Field(default_factory=dict)
    levels: list[str] = Field(default_factory=list)
    reference: str | None = None
    description: str | None = None

    _column = field_validator("column")(_column_name)
    _keys = field_validator("values")(_map_keys)

    @field_validator("levels")
    @classmethod
    def _levels(cls, value: list[str]) -> list[str]:
        _map_keys(dict.fromkeys(value, 0.0))
        return value

    @model_validator(mode="after")
    def _consistent(self) -> CueConfig:
        if self.type == "categorical":
            if len(self.levels) < 2:
                raise ValueError("a categorical cue needs at least two levels")
            if len(set(self.levels)) != len(self.levels):
                raise ValueError("levels must be distinct")
            if self.reference is None:
                raise ValueError("a categorical cue needs a reference level")
            if self.reference not in self.levels:
                raise ValueError(f"reference {self.reference!r} is not one of levels {self.levels}")
        else:
            if self.levels or self.reference is not None:
                raise ValueError("levels and reference apply to categorical cues only")
        if self.type == "binary":
            bad = {k: v for k, v in self.values.items() if v not in (0, 1)}
            if bad:
                raise ValueError(f"binary values must map to 0 or 1, not {bad}")
        elif self.values:
            raise ValueError("values applies to binary cues only")
        if self.range is not None:
            if self.type != "numeric":
                raise ValueError("range applies to numeric cues only")
            if self.range[0] > self.range[1]:
                raise ValueError("range must be [low, high] with low <= high")
        return self


class PolicyConfig(_Strict):
    forbidden: list[str] = Field(default_factory=list)
    tolerance: float = Field(0.10, gt=0)
    fdr: float = Field(0.05, gt=0, lt=1)
    consecutive_windows: int = Field(2, ge=1)
    proxy_tolerance: float | None = Field(None, gt=0)
    min_rows: int = Field(100, ge=3)
    drift_alpha: float = Field(0.001, gt=0, lt=1)
    drift_min_std_change: float = Field(0.10, ge=0)
    # How a weekly look decides "flagged" (monitor.stats.monitoring): "calibrated" uses
    # control limits set for a false-alarm rate per innocent person-cue-year;
    # "per_window_fdr" is the earlier rule (BH q <= fdr within one window end; drift
    # p < drift_alpha), kept for comparison.
    alert_rule: Literal["calibrated", "per_window_fdr"] = "calibrated"
    false_alerts_per_100_years: float = Field(0.5, gt=0, le=100)
    drift_false_alerts_per_100_years: float = Field(0.25, gt=0, le=100)
    consistency_floor: float | None = Field(0.5, ge=0, le=1)
    achievement_floor: float | None = Field(None, ge=-1, le=1)
    achievement_min_linked: int = Field(100, ge=3)


class WindowsConfig(_Strict):
    length_days: int = Field(90, ge=1)
    step_days: int = Field(7, ge=1)
    min_rows: int = Field(40, ge=3)
    origin: str = "2000-01-02"  # a Sunday: windows end on the same weekday every week

    @field_validator("origin")
    @classmethod
    def _iso_date(cls, value: str) -> str:
        from datetime import date

        date.fromisoformat(value)
        return value


class EmailConfig(_Strict):
    host: str
    port: int = Field(25, ge=1, le=65535)
    security: Literal["none", "starttls", "ssl"] = "none"
    sender: str
    to: list[str] = Field(min_length=1)
    username_env: str | None = None
    password_env: str | None = None
    timeout_s: float = Field(20.0, gt=0)
    # Credentials over plain SMTP only to a relay on this machine, and only when asked.
    allow_plaintext_auth: bool = False

    @model_validator(mode="after")
    def _no_credentials_in_clear(self) -> EmailConfig:
        has_credentials = self.username_env is not None or self.password_env is not None
        if self.allow_plaintext_auth and not is_loopback_host(self.host):
            raise ValueError(
                f"allow_plaintext_auth applies only to a relay on a loopback address "
                f"(127.0.0.1, ::1 or localhost), not {self.host!r}"
            )
        if has_credentials and self.security == "none" and not self.allow_plaintext_auth:
            raise ValueError(
                'refusing to send the SMTP credentials without TLS: set security = "starttls" '
                'or "ssl", or allow_plaintext_auth = true for a relay on a loopback address'
            )
        return self


def is_loopback_host(host: str) -> bool:
    """True for an IP literal on the loopback network (127.0.0.0/8, ::1) or 'localhost'."""
    if host.strip().lower().rstrip(".") == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip().strip("[]")).is_loopback
    except ValueError:
        return False


class WebhookConfig(_Strict):
    url: str
    secret_env: str | None = None
    timeout_s: float = Field(10.0, gt=0)
    retries: int = Field(3, ge=0)
    backoff_s: float = Field(1.0, ge=0)

    @field_validator("url")
    @classmethod
    def _http(cls, value: str) -> str:
        if not value.startswith(("http://", "https://")):
            raise ValueError("url must start with http:// or https://")
        return value


class AlertsConfig(_Strict):
    file: Path | None = None
    email: EmailConfig | None = None
    webhook: WebhookConfig | None = None
    # Wall-clock limit on one run's deliveries (all sinks, retries and waits included);
    # what is left stays in the outbox for the next run.
    delivery_budget_s: float = Field(60.0, gt=0)


class ScheduleConfig(_Strict):
    cron: str = "0 2 * * *"
    timezone: str = "UTC"
    misfire_grace_s: int = Field(3600, ge=1)

    _tz = field_validator("timezone")(_check_timezone)

    @field_validator("cron")
    @classmethod
    def _five_fields(cls, value: str) -> str:
        if len(value.split()) != 5:
            raise ValueError("cron must have five fields: minute hour day month day-of-week")
        return value


class DashboardConfig(_Strict):
    # The name of an environment variable holding a shared secret that the dashboard's
    # acknowledge form then asks for (unset: no secret is asked).
    ack_secret_env: str | None = None

    @field_validator("ack_secret_env")
    @classmethod
    def _env_name(cls, value: str | None) -> str | None:
        if value is not None and not re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*", value):
            raise ValueError(f"ack_secret_env must be an environment variable name, not {value!r}")
        return value


# The encodings DuckDB's CSV reader decodes itself (Python's codec name -> DuckDB's).
_CSV_ENCODINGS = {"utf-8": "utf-8", "utf-16": "utf-16", "iso8859-1": "latin-1"}


class IngestConfig(_Strict):
    delimiter: str = ","
    encoding: str = "utf-8"
    # At most a century ahead: the horizon is a datetime, which ends at year 9999.
    future_tolerance_hours: float = Field(24.0, ge=0, le=24 * 366 * 100)
    earliest: str = "1990-01-01"
    # DuckDB's memory limit while ingesting: large files spill to disk beyond it.
    memory_limit: str = "768MB"
    # A landing file is read only once it has not changed for this long (0: at once);
    # see monitor.ingest.files.plan_files.
    settle_seconds: float = Field(5.0, ge=0, le=24 * 3600)
    # A numeric cue, judgment or criterion with no range of its own whose magnitude
    # exceeds this is quarantined (implausible_magnitude).  At most 1e100: beyond it the
    # bucket statistics' sums of squares could overflow a double.
    max_magnitude: float = Field(1e15, gt=0, le=1e100)

    @field_validator("memory_limit")
    @classmethod
    def _size(cls, value: str) -> str:
        if not re.fullmatch(r"\s*\d+(\.\d+)?\s*(B|KB|MB|GB|KiB|MiB|GiB)\s*", value, re.IGNORECASE):
            raise ValueError("memory_limit must be a size such as '768MB' or '2GB'")
        return value.strip()

    @field_validator("delimiter")
    @classmethod
    def _one_character(cls, value: str) -> str:
        if len(value) != 1 or value in '"\r\n':
            raise ValueError(
                f"delimiter must be one character other than a double quote or a line end, "
                f"not {value!r}"
            )
        return value

    @field_validator("encoding")
    @classmethod
    def _readable_encoding(cls, value: str) -> str:
        try:
            python_name = codecs.lookup(value).name
        except LookupError:
            raise ValueError(f"unknown encoding {value!r}; use utf-8, utf-16 or latin-1") from None
        if python_name not in _CSV_ENCODINGS:
            raise ValueError(
                f"encoding {value!r} cannot be read by the CSV reader; use utf-8, utf-16 or latin-1"
            )
        return _CSV_ENCODINGS[python_name]

    @field_validator("earliest")
    @classmethod
    def _iso_time(cls, value: str) -> str:
        try:
            parsed = datetime.fromisoformat(value.strip())
        except ValueError:
            raise ValueError(
                f"earliest must be an ISO 8601 date or time such as 1990-01-01, not {value!r}"
            ) from None
        # As written when it is a plain date (the form the messages show), otherwise the
        # full ISO form the store's SQL reads the same way.
        text = value.strip()
        return text if re.fullmatch(r"\d{4}-\d{2}-\d{2}", text) else parsed.isoformat()


class Config(_Strict):
    store: StoreConfig = Field(default_factory=StoreConfig)
    decisions: DecisionsConfig
    outcomes: OutcomesConfig | None = None
    cues: dict[str, CueConfig] = Field(min_length=1)
    policy: PolicyConfig = Field(default_factory=PolicyConfig)
    windows: WindowsConfig = Field(default_factory=WindowsConfig)
    alerts: AlertsConfig = Field(default_factory=AlertsConfig)
    schedule: ScheduleConfig = Field(default_factory=ScheduleConfig)
    ingest: IngestConfig = Field(default_factory=IngestConfig)
    dashboard: DashboardConfig = Field(default_factory=DashboardConfig)
    lake: LakeConfig | None = None

    # Not part of the file: where it came from and its content hash.
    source: Annotated[Path | None, Field(exclude=True)] = None
    digest: Annotated[str, Field(exclude=True)] = ""

    @model_validator(mode="after")
    def _cross_checks(self) -> Config:
        # Imported here, not at the top: the store's package imports this module.
        from monitor.store.rules import RESERVED_COLUMN_NAMES

        seen: dict[str, str] = {}
        for name in self.cues:
            if not _NAME.match(name):
                raise ValueError(
                    f"cues: {name!r} is not a cue name (a letter followed by at most 62 "
                    "letters, digits or '_')"
                )
            if name.lower() in RESERVED_COLUMN_NAMES:
                raise ValueError(
                    f"cues.{name}: the store uses the column name {name.lower()!r} itself "
                    "(decisions, outcomes or their views); give the cue another name"
                )
            if name.lower() in seen:
                raise ValueError(
                    f"cues.{name}: differs from cue {seen[name.lower()]!r} only in case, "
                    "and the store's column names ignore case"
                )
            seen[name.lower()] = name
        for cue in self.policy.forbidden:
            if cue not in self.cues:
                raise ValueError(f"policy.forbidden: {cue!r} is not a declared cue")
        if self.lake is not None:
            if self.decisions.change is not None:
                raise ValueError(
                    "lake: decisions.change (corrections) is not read from a lake; "
                    "leave it out or ingest the files instead"
                )
            if self.lake.has_outcomes() and self.outcomes is None:
                raise ValueError("lake: outcomes are named but there is no [outcomes] section")
        return self

    # --- derived views used by other stages -------------------------------------------

    def cue_column(self, name: str) -> str:
        """The column holding cue ``name`` in the decision files."""
        return self.cues[name].column or name

    def design_columns(self) -> list[str]:
        """The model's design columns in order: numeric and binary cues by name,
        categorical cues as one dummy per non-reference level named ``cue=level``."""
        out: list[str] = []
        for name, cue in self.cues.items():
            if cue.type == "categorical":
                out.extend(dummy_name(name, lvl) for lvl in cue.levels if lvl != cue.reference)
            else:
                out.append(name)
        return out

    def design_groups(self) -> dict[str, list[int]]:
        """For each cue, the indices of its design columns."""
        cols = self.design_columns()
        return {name: cue_columns(cols, name) for name in self.cues}

    @property
    def judgment_is_binary(self) -> bool:
        vals = set(self.decisions.judgment_values.values())
        rng = self.decisions.judgment_range
        return (bool(vals) and vals <= {0.0, 1.0}) or (rng is not None and tuple(rng) == (0, 1))


def _location(loc: tuple) -> str:
    return ".".join(str(p) for p in loc)


def _first_error(exc: ValidationError, source: Path) -> ConfigError:
    err = exc.errors()[0]
    key = _location(err.get("loc", ())) or "(top level)"
    kind = err.get("type", "")
    msg = err.get("msg", "invalid value")
    if msg.startswith("Value error, "):
        msg = msg[len("Value error, ") :]
    if kind == "extra_forbidden":
        return ConfigError(f"{source}: unknown key '{key}'.")
    if kind == "missing":
        return ConfigError(f"{source}: required key '{key}' is missing.")
    if kind == "literal_error":
        return ConfigError(f"{source}: key '{key}': {msg}.")
    # Cross-field errors already name their key ("cues.x: ...", "policy.forbidden: ...").
    if key == "(top level)" and re.match(r"^[a-z_]+(\.[A-Za-z0-9_]+)*:", msg):
        return ConfigError(f"{source}: {msg.rstrip('.')}.")
    return ConfigError(f"{source}: key '{key}': {msg.rstrip('.')}.")


def _resolve(base: Path, path: Path | None) -> Path | None:
    if path is None:
        return None
    path = Path(os.path.expanduser(str(path)))
    return path if path.is_absolute() else (base / path).resolve()


def _resolve_location(base: Path, location: str | None) -> str | None:
    """A lake location: a URL (scheme://...) as given, a local path resolved like the
    file's other paths."""
    if location is None or re.match(r"^[A-Za-z][A-Za-z0-9+.-]*://", location):
        return location
    return str(_resolve(base, Path(location)))


def load_config(path: str | os.PathLike | None = None) -> Config:
    """Read, validate and resolve a configuration file.

    ``path`` falls back to the ``CUEWATCH_CONFIG`` environment variable.  Raises
    ``ConfigError`` (one sentence, names the key and the file) on any user error.
    """
    if path is None:
        path = os.environ.get(ENV_VAR)
    if not path:
        raise ConfigError(f"no configuration given: pass --config FILE or set {ENV_VAR}.")
    source = Path(path).expanduser().resolve()
    try:
        raw_bytes = source.read_bytes()
    except FileNotFoundError:
        raise ConfigError(f"{source}: configuration file not found.") from None
    except OSError as exc:
        raise ConfigError(f"{source}: cannot read the configuration ({exc.strerror}).") from None
    try:
        raw = tomllib.loads(raw_bytes.decode("utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{source}: not valid TOML ({exc}).") from None
    try:
        cfg = Config.model_validate(raw)
    except ValidationError as exc:
        raise _first_error(exc, source) from None
    base = source.parent
    updates = {
        "store": cfg.store.model_copy(update={"path": _resolve(base, cfg.store.path)}),
        "decisions": cfg.decisions.model_copy(
            update={"landing": _resolve(base, cfg.decisions.landing)}
        ),
        "alerts": cfg.alerts.model_copy(update={"file": _resolve(base, cfg.alerts.file)}),
        "source": source,
        "digest": hashlib.sha256(raw_bytes).hexdigest(),
    }
    if cfg.lake is not None:
        updates["lake"] = cfg.lake.model_copy(
            update={
                k: _resolve_location(base, getattr(cfg.lake, k))
                for k in ("decisions", "outcomes", "quarantine")
            }  # fmt: skip
        )
    if cfg.outcomes is not None:
        updates["outcomes"] = cfg.outcomes.model_copy(
            update={"landing": _resolve(base, cfg.outcomes.landing)}
        )
    return cfg.model_copy(update=updates)
