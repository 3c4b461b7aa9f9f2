"""Configuration: a TOML file validated by pydantic.

Every mistake a user can make in the file (unknown key, wrong type, bad regex, missing
``message`` group) becomes one :class:`~tracewatch.errors.ConfigError` naming the key.
"""

from __future__ import annotations

import re
import tomllib
from pathlib import Path
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from .errors import ConfigError

FORMATS = ("text", "jsonl", "syslog", "otlp-json", "strace")


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


def _check_regex(value: str | None, *, groups: tuple[str, ...] = ()) -> str | None:
    if value is None:
        return None
    try:
        compiled = re.compile(value)
    except re.error as exc:
        raise ValueError(f"invalid regular expression: {exc}") from None
    for group in groups:
        if group not in compiled.groupindex:
            raise ValueError(f"the regular expression needs a named group (?P<{group}>...)")
    return value


class SourceConfig(_Section):
    """One input: files of one format whose records share a session key."""

    name: str = Field(min_length=1, pattern=r"^[A-Za-z0-9_.-]+$")
    paths: list[str] = Field(default_factory=list)
    format: Literal["text", "jsonl", "syslog", "otlp-json", "strace"] = "text"
    # text: named groups; `message` required, `ts`, `level` and `key` optional.
    line_pattern: str | None = None
    # text/syslog: a regex with group `key`, searched in the line; jsonl: a dotted field path.
    session_key: str | None = None
    # jsonl field paths (dotted)
    message_field: str = "message"
    time_field: str | None = "time"
    level_field: str | None = "level"
    event_field: str | None = None
    # text: a line matching this regex does not start a new record; it is attached to the
    # previous one (stack traces, continuation lines), at most `continuation_max` lines.
    continuation_pattern: str | None = None
    continuation_max: int = Field(default=50, ge=0)
    max_line_bytes: int = Field(default=65536, ge=64)
    start_at: Literal["end", "beginning"] = "end"

    @field_validator("line_pattern")
    @classmethod
    def _line_pattern(cls, v: str | None) -> str | None:
        return _check_regex(v, groups=("message",))

    @field_validator("continuation_pattern")
    @classmethod
    def _continuation(cls, v: str | None) -> str | None:
        return _check_regex(v)

    @model_validator(mode="after")
    def _per_format(self) -> "SourceConfig":
        if self.format == "text" and self.session_key is not None:
            try:
                _check_regex(self.session_key, groups=("key",))
            except ValueError as exc:
                raise ValueError(f"session_key: {exc}") from None
        if self.format == "jsonl" and self.session_key is not None:
            if not re.fullmatch(r"[^.\s]+(\.[^.\s]+)*", self.session_key):
                raise ValueError("session_key: for jsonl it is a dotted field path such as 'ctx.request_id'")
        return self


class SessionsConfig(_Section):
    idle_timeout_s: float = Field(default=30.0, gt=0)
    max_duration_s: float = Field(default=3600.0, gt=0)
    max_events: int = Field(default=2000, ge=2)
    # a message matching this regex ends its session (searched in the message)
    end_pattern: str | None = None
    # keyless sources: records are grouped into windows of this many seconds
    window_s: float = Field(default=60.0, gt=0)
    max_open_sessions: int = Field(default=100_000, ge=1)

    @field_validator("end_pattern")
    @classmethod
    def _end(cls, v: str | None) -> str | None:
        return _check_regex(v)


class TemplatesConfig(_Section):
    depth: int = Field(default=4, ge=3, le=8)
    similarity: float = Field(default=0.5, gt=0, le=1)
    max_children: int = Field(default=100, ge=2)


class FeaturesConfig(_Section):
    ngram_max: int = Field(default=3, ge=1, le=5)


class ModelConfig(_Section):
    k: int | Literal["auto"] = "auto"
    k_max: int = Field(default=16, ge=2)
    false_alarm_rate: float = Field(default=0.005, gt=0, lt=0.5)
    scorer: Literal["centroid", "knn"] = "centroid"
    knn_k: int = Field(default=1, ge=1)
    calibration_fraction: float = Field(default=0.25, gt=0, lt=0.9)
    # clusters holding less than this share of the baseline are reported as contamination
    min_cluster_share: float = Field(default=0.005, ge=0, lt=0.5)
    restarts: int = Field(default=4, ge=1)
    seed: int = 0

    @field_validator("k")
    @classmethod
    def _k(cls, v: int | str) -> int | str:
        if isinstance(v, int) and v < 1:
            raise ValueError("k must be 'auto' or an integer of at least 1")
        return v


class ServerConfig(_Section):
    listen: str = "127.0.0.1:9464"

    @field_validator("listen")
    @classmethod
    def _listen(cls, v: str) -> str:
        host, sep, port = v.rpartition(":")
        if not sep or not host or not port.isdigit() or not 0 < int(port) < 65536:
            raise ValueError("listen must look like HOST:PORT, for example 127.0.0.1:9464")
        return v


class Config(_Section):
    state_dir: Path = Path("./tracewatch-state")
    sources: list[SourceConfig] = Field(default_factory=list)
    sessions: SessionsConfig = SessionsConfig()
    templates: TemplatesConfig = TemplatesConfig()
    features: FeaturesConfig = FeaturesConfig()
    model: ModelConfig = ModelConfig()
    server: ServerConfig = ServerConfig()
    # regexes whose matches are replaced by «redacted» in any raw line tracewatch stores or shows
    redact: list[str] = Field(default_factory=list)

    @field_validator("redact")
    @classmethod
    def _redact(cls, v: list[str]) -> list[str]:
        for pattern in v:
            _check_regex(pattern)
        return v

    @model_validator(mode="after")
    def _unique_names(self) -> "Config":
        names = [s.name for s in self.sources]
        dupes = sorted({n for n in names if names.count(n) > 1})
        if dupes:
            raise ValueError(f"sources: the name {dupes[0]!r} is used twice")
        return self

    def source(self, name: str) -> SourceConfig:
        for src in self.sources:
            if src.name == name:
                return src
        raise ConfigError(f"config: no source named {name!r}")


def _describe(exc: ValidationError) -> str:
    err = exc.errors()[0]
    loc = ""
    for part in err["loc"]:
        loc += f"[{part}]" if isinstance(part, int) else (f".{part}" if loc else str(part))
    msg = err["msg"].removeprefix("Value error, ")
    if err["type"] == "extra_forbidden":
        msg = "unknown key"
    elif err["type"] == "missing":
        msg = "required key is missing"
    extra = f" (and {len(exc.errors()) - 1} more problem(s))" if len(exc.errors()) > 1 else ""
    return f"{loc or 'config'}: {msg}{extra}"


def parse_config(data: dict, *, origin: str = "config") -> Config:
    try:
        return Config.model_validate(data)
    except ValidationError as exc:
        raise ConfigError(f"{origin}: {_describe(exc)}") from None


def load_config(path: str | Path) -> Config:
    """Read and validate a TOML config file; relative ``state_dir`` is taken from the file's folder."""
    path = Path(path)
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read config file: {exc.strerror or exc}") from None
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{path}: not valid TOML: {exc}") from None
    cfg = parse_config(data, origin=str(path))
    if not cfg.state_dir.is_absolute():
        cfg = cfg.model_copy(update={"state_dir": (path.parent / cfg.state_dir).resolve()})
    return cfg


def adhoc_config(fmt: str, *, state_dir: Path | None = None) -> Config:
    """The config used when a command gets ``--format FMT`` and no file: the whole line is the message."""
    if fmt not in FORMATS:
        raise ConfigError(f"--format: unknown format {fmt!r}; choose one of {', '.join(FORMATS)}")
    data: dict = {"sources": [{"name": "input", "format": fmt}]}
    if state_dir is not None:
        data["state_dir"] = str(state_dir)
    return parse_config(data, origin="--format")
