"""Configuration: a TOML file validated by pydantic.

Every mistake a user can make in the file (unknown key, wrong type, bad regex, missing
``message`` group) becomes one :class:`~tracewatch.errors.ConfigError` naming the key.
"""

from __future__ import annotations

import re
import tomllib
from pathlib import Path
from typing import Annotated, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from .errors import ConfigError
from .timestamps import check_ts_format
from .formats import FORMATS
from .model.score import ScorerName


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


def _check_regex(value: str | None, *, groups: tuple[str, ...] = ()) -> str | None:
    if value is None:
        return None
    try:
        compiled = re.compile(value)
    except re.error as exc:
        raise ValueError(f"invalid regular expression: {exc}") from exc
    for group in groups:
        if group not in compiled.groupindex:
            raise ValueError(f"the regular expression needs a named group (?P<{group}>...)")
    return value


# options that belong to one format; setting one for another format is a config error
_FORMAT_ONLY = {"session_field": "syslog", "span_event": "otlp-json", "max_document_bytes": "otlp-json",
                "strace_session": "strace", "journal_key_fields": "journald", "journalctl_args": "journald",
                "log_key_attribute": "otlp-logs-json"}
# formats that wrap the application's lines, read by an inner format (tracewatch/formats/container.py)
CONTAINER_FORMATS = ("cri", "docker-json")
_CONTAINER_ONLY = ("payload_format", "container_key_prefix")
# journalctl options the daemon sets itself (tracewatch/sources/journal.py)
_JOURNALCTL_OWN = ("-o", "--output", "-f", "--follow", "-n", "--lines", "--no-tail", "--after-cursor", "--cursor",
                   "--since", "--until", "-r", "--reverse", "--show-cursor", "-S", "-U", "-c", "--cursor-file",
                   "-e", "--pager-end", "--no-pager", "-q", "--quiet", "--output-fields", "--all", "-a")


class SourceConfig(_Section):
    """One input: files of one format whose records share a session key."""

    name: str = Field(min_length=1, pattern=r"^[A-Za-z0-9_.-]+$")
    paths: list[str] = Field(default_factory=list)
    format: Literal[tuple(FORMATS)] = "text"  # type: ignore[valid-type]
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
    # text (group `ts`) and jsonl (time_field): how times are written, a layout of tracewatch/timestamps.py (iso8601,
    # epoch, epoch_ms, postgres, syslog, asctime, yymmdd, log4j) or a strptime pattern; unset:
    # the layout of the source's first readable stamp
    ts_format: str | None = None
    # fit refuses (score warns) when more than this share of the source's lines are rejected, or
    # of its keyed records carry no usable time
    max_unread_share: float = Field(default=0.5, ge=0, le=1)
    start_at: Literal["end", "beginning"] = "end"
    # -- syslog, otlp-json and strace options (tracewatch/formats/{syslog,otlp,strace}.py) ------
    # syslog: take the session key from a header field (hostname, app_name, procid, msgid) or a
    # structured-data parameter written as in the message, "[SD-ID PARAM]"; when the message
    # lacks it, `session_key` (a regex with group `key` searched in MSG) is tried.
    session_field: str | None = None
    # otlp-json: what a span's event type is made of, joined with ":" in this order
    # ("status" adds ":ERROR" only to spans whose status is an error).
    span_event: list[Literal["service", "kind", "name", "status"]] = ["service", "kind", "name", "status"]
    # otlp-json: a JSON document spread over several lines is held until complete, up to this size
    max_document_bytes: int = Field(default=20 * 2**20, ge=1024)
    # strace: one session per process ("pid") or per process tree ("tree": a child joins the
    # session of the process that forked it)
    strace_session: Literal["pid", "tree"] = "pid"
    # -- container logs (tracewatch/formats/container.py): cri, docker-json ---------------------
    # the format of the application's lines inside the container log, read with this source's
    # options (line_pattern, message_field, session_key, ...)
    payload_format: Literal[tuple(f for f in FORMATS if f not in CONTAINER_FORMATS)] = "text"  # type: ignore[valid-type]
    # session keys become "<namespace>/<pod>/<container>:<key>" (from kubelet's file names), and
    # alerts name the container
    container_key_prefix: bool = True
    # -- journald (tracewatch/formats/journald.py, tracewatch/sources/journal.py) ----------------
    # journal fields whose values, joined with "/", make the session key (e.g. ["_SYSTEMD_UNIT",
    # "_PID"]); with session_key as well, its match in MESSAGE follows after ":"
    journal_key_fields: list[Annotated[str, Field(pattern=r"^[A-Z0-9_]{1,64}$")]] = Field(default_factory=list)
    # the daemon follows the journal live with `journalctl --follow -o json` and these extra
    # arguments (matches, --unit=, --file=, --directory=); unset: read `paths` (files of
    # `journalctl -o json` output)
    journalctl_args: list[str] | None = None
    # -- otlp-logs-json (tracewatch/formats/otlp_logs.py) ----------------------------------------
    # a log record without a trace id is keyed by this attribute (of the record, else its resource)
    log_key_attribute: str | None = Field(default=None, min_length=1, max_length=256)

    @property
    def line_limit(self) -> int:
        """Bytes a line is read up to: ``max_document_bytes`` for otlp-json and otlp-logs-json (an
        exporter writes a whole export batch on one line), else ``max_line_bytes``."""
        if self.format in ("otlp-json", "otlp-logs-json"):
            return max(self.max_line_bytes, self.max_document_bytes)
        return self.max_line_bytes

    @property
    def content_format(self) -> str:
        """The format of the application's own lines: the inner one for container logs."""
        return self.payload_format if self.format in CONTAINER_FORMATS else self.format

    def _check_format_options(self) -> None:
        for key in _CONTAINER_ONLY:
            if key in self.model_fields_set and self.format not in CONTAINER_FORMATS:
                raise ValueError(f"{key}: only used with format = \"cri\" or \"docker-json\"")
        for key, fmt in _FORMAT_ONLY.items():
            if key in self.model_fields_set and self.content_format != fmt:
                raise ValueError(f"{key}: only used with format = \"{fmt}\"")
        if "ts_format" in self.model_fields_set and self.content_format not in ("text", "jsonl"):
            raise ValueError('ts_format: only used with format = "text" or "jsonl" (or as their payload_format)')
        if self.journalctl_args is not None:
            if self.format != "journald":
                raise ValueError('journalctl_args: only used with format = "journald"')
            if self.paths:
                raise ValueError("journalctl_args: a source follows either the journal or its paths, not both")
            for arg in self.journalctl_args:
                if arg.split("=", 1)[0] in _JOURNALCTL_OWN or (arg[:2] in ("-o", "-n") and len(arg) > 2):
                    raise ValueError(f"journalctl_args: {arg!r} is set by tracewatch itself (output, follow, "
                                     "position); give matches, --unit=, --file= or --directory=")
        if self.session_field is not None and not re.fullmatch(
                r"hostname|app_name|procid|msgid|\[[^\s=\]\"]{1,32} [^\s=\]\"]{1,32}\]", self.session_field):
            raise ValueError("session_field: use hostname, app_name, procid, msgid or a structured-data "
                             "parameter written \"[SD-ID PARAM]\", for example \"[origin ip]\"")
        if "name" not in self.span_event:
            raise ValueError('span_event: must include "name"')

    @field_validator("line_pattern")
    @classmethod
    def _line_pattern(cls, v: str | None) -> str | None:
        return _check_regex(v, groups=("message",))

    @field_validator("ts_format")
    @classmethod
    def _ts_format(cls, v: str | None) -> str | None:
        return check_ts_format(v)

    @field_validator("continuation_pattern")
    @classmethod
    def _continuation(cls, v: str | None) -> str | None:
        return _check_regex(v)

    @model_validator(mode="after")
    def _per_format(self) -> "SourceConfig":
        if self.content_format in ("text", "syslog", "journald") and self.session_key is not None:
            try:
                _check_regex(self.session_key, groups=("key",))
            except ValueError as exc:
                raise ValueError(f"session_key: {exc}") from exc
        self._check_format_options()
        if self.content_format == "jsonl" and self.session_key is not None:
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
    routing_tokens: int = Field(default=2, ge=1, le=6)  # leading tokens that route a message in the tree
    # share of equal tokens, over the positions where both hold a constant, to join a template
    join_share: float = Field(default=0.75, gt=0, le=1)
    max_branches: int = Field(default=100, ge=2)  # per tree node; beyond it new tokens go to <var>


class FeaturesConfig(_Section):
    ngram_max: int = Field(default=3, ge=1, le=5)
    # with [model] expected_bad_share > 0: an n-gram seen in fewer baseline sessions than this
    # (and than the incidents expected) is not learned, it counts as never seen: a handful of
    # copies of an incident in the baseline must not make it normal
    min_support: int = Field(default=5, ge=1)


class ModelConfig(_Section):
    k: int | Literal["auto"] = "auto"
    k_max: int = Field(default=16, ge=2)
    false_alarm_rate: float = Field(default=0.005, gt=0, lt=0.5)
    scorer: ScorerName = "centroid"  # a plug-in of tracewatch/model/score.py
    knn_k: int = Field(default=1, ge=1)
    # centroid scorer: how many cluster spreads a session made entirely of n-grams never seen
    # at fit counts for (new transitions between known steps are the commonest anomaly)
    unseen_weight: float = Field(default=5.0, ge=0)
    calibration_fraction: float = Field(default=0.25, gt=0, lt=0.9)
    # the share of baseline sessions expected to be incidents; cross-fitting sets such sessions
    # aside before fitting and the fit report lists them. 0 (the default) trusts the baseline;
    # 0.01 (a few incidents on an ordinary day) is the value to try with the centroid scorer.
    # Off by default: on a clean baseline the rarest ~1% of normal sessions are set aside with
    # the incidents, so the calibration lacks them and the false-alarm rate on tomorrow's
    # traffic rises past twice the asked one (clean 3000-session baselines at 0.01, asked rate
    # 0.005: 1.2% lockers and 1.4% bike docks with the centroid scorer, 3.7% lockers with knn)
    expected_bad_share: float = Field(default=0.0, ge=0, lt=0.5)
    # clusters holding less than this share of the baseline are reported as contamination
    min_cluster_share: float = Field(default=0.005, ge=0, lt=0.5)
    restarts: int = Field(default=4, ge=1)
    seed: int = 0
    # large corpora: fit by mini-batches (bounded memory) — true, false, or "auto": when the
    # baseline has more than streaming_rows distinct (source, sequence) rows
    streaming: bool | Literal["auto"] = "auto"
    streaming_rows: int = Field(default=50_000, ge=1)

    @field_validator("streaming", mode="before")
    @classmethod
    def _streaming(cls, v: object) -> object:
        if v is not True and v is not False and v != "auto":
            raise ValueError('streaming must be true, false or "auto"')
        return v

    @field_validator("k")
    @classmethod
    def _k(cls, v: int | str) -> int | str:
        if isinstance(v, int) and v < 1:
            raise ValueError("k must be 'auto' or an integer of at least 1")
        return v


def _check_listen(v: str, example: str) -> str:
    host, sep, port = v.rpartition(":")
    if not sep or not host or not port.isdigit() or not 0 < int(port) < 65536:
        raise ValueError(f"listen must look like HOST:PORT, for example {example}")
    return v


class ServerConfig(_Section):
    listen: str = "127.0.0.1:9464"

    @field_validator("listen")
    @classmethod
    def _listen(cls, v: str) -> str:
        return _check_listen(v, "127.0.0.1:9464")


class OtlpConfig(_Section):
    """The OTLP/HTTP receiver of ``tracewatch run`` (tracewatch/service/otlp_http.py): spans
    POSTed to /v1/traces go to ``traces_source``, log records POSTed to /v1/logs to
    ``logs_source``; each is spooled in ``<state_dir>/otlp/`` before it is acknowledged."""

    enabled: bool = False
    # 4318: the OTLP/HTTP default port. Loopback only by default: binding wider lets anything
    # that reaches the port send records (and raise or hide alerts)
    listen: str = "127.0.0.1:4318"
    traces_source: str | None = None  # a source with format = "otlp-json" and no paths
    logs_source: str | None = None  # a source with format = "otlp-logs-json" and no paths
    # a request body larger than this, as sent or once decompressed, is refused (413)
    max_request_bytes: int = Field(default=20 * 2**20, ge=1024, le=1 << 30)
    # spooled and not read yet: past this, requests are refused with 429 and Retry-After
    max_queue_bytes: int = Field(default=64 * 2**20, ge=1 << 16, le=1 << 36)
    retry_after_s: int = Field(default=1, ge=1, le=3600)
    # a spool file is closed and a new one begun past this size; read files are deleted at the
    # next checkpoint
    spool_file_bytes: int = Field(default=64 * 2**20, ge=1 << 16, le=1 << 34)

    @field_validator("listen")
    @classmethod
    def _listen(cls, v: str) -> str:
        return _check_listen(v, "127.0.0.1:4318")


class DaemonConfig(_Section):
    """How ``tracewatch run`` follows files and keeps its state (tracewatch/service/daemon.py)."""

    # "native": kernel change notifications (inotify on Linux); "polling": stat the watched
    # folders every poll_interval_s (network filesystems, where notifications do not arrive)
    watcher: Literal["native", "polling"] = "native"
    # polling period, and how often followed files are re-checked even without any notification
    poll_interval_s: float = Field(default=1.0, ge=0.05, le=60)
    # a file renamed or deleted away is still read while it keeps growing, until it has been
    # quiet this long (writers reopen their log a moment after a rotation)
    rotation_grace_s: float = Field(default=2.0, ge=0, le=600)
    # offsets, open sessions and learned templates are saved this often (and on shutdown)
    checkpoint_interval_s: float = Field(default=5.0, ge=0.1, le=3600)
    # how many recent alerts /api/alerts can return
    alerts_kept: int = Field(default=1000, ge=1, le=1_000_000)


# -- incidents and notifications (tracewatch/alerts/incidents.py, sinks.py) ------------------
def _check_url(v: str | None) -> str | None:
    from urllib.parse import urlsplit

    if v is None:
        return None
    parts = urlsplit(v)
    if parts.scheme not in ("http", "https") or not parts.hostname:
        raise ValueError("must be an http:// or https:// URL with a host")
    return v.rstrip("/")


class IncidentsConfig(_Section):
    """Grouping alerts into incidents, and who may change an incident's status."""

    # an alert joins the nearest incident when its average cosine distance to the incident's
    # alerts is at most this (0 = only identical alerts, 1 = anything sharing a feature)
    cut: float = Field(default=0.5, gt=0, le=1)
    # an incident takes new alerts while its last one is at most this old (event time)
    window_s: float = Field(default=1800.0, gt=0)
    # open or acknowledged incidents with no alert for this long are resolved (0 = never)
    auto_resolve_s: float = Field(default=1800.0, ge=0)
    # an alert with an incident's signature (the same never-seen event, missing step, retried
    # step ...) joins it while the incident's last alert is at most this old, past window_s, and
    # reopens it when it was resolved automatically: a problem that comes back within the day stays
    # one incident (0 = by signature within window_s only)
    recur_s: float = Field(default=86_400.0, ge=0)
    # notifications go out again when an open incident's alert count reaches these
    escalation_steps: list[int] = Field(default_factory=lambda: [10, 100, 1000])
    # candidate representatives kept per incident (the medoid is chosen among them)
    max_members: int = Field(default=32, ge=1, le=1000)
    max_samples: int = Field(default=5, ge=0, le=50)
    # bearer token for POST /api/incidents/{id}/ack|resolve|expected: given here, or read from
    # the environment variable named by token_env; with neither, state changes are refused
    token: str | None = Field(default=None, min_length=16)
    token_env: str = Field(default="TRACEWATCH_INCIDENT_TOKEN", pattern=r"^[A-Za-z_][A-Za-z0-9_]*$")
    page_refresh_s: int = Field(default=30, ge=5, le=3600)

    @field_validator("escalation_steps")
    @classmethod
    def _steps(cls, v: list[int]) -> list[int]:
        if any(n < 2 for n in v) or v != sorted(set(v)):
            raise ValueError("increasing alert counts of at least 2, e.g. [10, 100, 1000]")
        return v


class NotifyConfig(_Section):
    """Where incident notifications go (both optional; none configured = none sent)."""

    webhook_url: str | None = None
    # base URL of a Prometheus Alertmanager; incidents are POSTed to <url>/api/v2/alerts
    alertmanager_url: str | None = None
    # extra Alertmanager labels, e.g. {team = "lockers"}
    alertmanager_labels: dict[str, str] = Field(default_factory=dict)
    # the incident page's address as receivers should link to it (default http://<server.listen>)
    page_url: str | None = None
    timeout_s: float = Field(default=5.0, gt=0, le=120)
    retry_initial_s: float = Field(default=1.0, gt=0, le=3600)
    retry_max_s: float = Field(default=300.0, gt=0, le=86400)
    # firing incidents are sent to Alertmanager again this often while open
    resend_s: float = Field(default=60.0, ge=1, le=3600)

    @field_validator("webhook_url", "alertmanager_url", "page_url")
    @classmethod
    def _urls(cls, v: str | None) -> str | None:
        return _check_url(v)

    @field_validator("alertmanager_labels")
    @classmethod
    def _labels(cls, v: dict[str, str]) -> dict[str, str]:
        for name in v:  # Prometheus label names: [a-zA-Z_][a-zA-Z0-9_]*, "__" prefix reserved
            if not re.fullmatch(r"[a-zA-Z_][a-zA-Z0-9_]*", name) or name.startswith("__"):
                raise ValueError(f"{name!r} is not a valid Prometheus label name")
        return v


# -- triage (tracewatch/triage.py) ------------------------------------------------------------
class TriageConfig(_Section):
    """Learning from on-call labels: which new incidents are expected, which a known problem."""

    enabled: bool = True
    # what the kernel perceptron compares: "cosine" or "rbf" on the alert's grouping vector
    # (explanation and sequence n-grams), "spectrum" on its template-id sequence (which shares
    # the normal steps with every fault of a workflow, so it abstains less on unlabelled faults)
    kernel: Literal["cosine", "rbf", "spectrum"] = "cosine"
    rbf_gamma: float = Field(default=1.0, gt=0, le=1000)
    spectrum_n: int = Field(default=3, ge=1, le=8)
    epochs: int = Field(default=20, ge=1, le=1000)
    seed: int = 0
    # below this confidence margin (0..1, the distance in feature space to the boundary between
    # the best and the second-best label) triage abstains: no label is suggested
    min_margin: float = Field(default=0.15, ge=0, le=1)
    # a new incident triage calls expected is opened as "expected", without a notification
    suppress_expected: bool = True


# -- baseline refit (tracewatch/refit.py) ----------------------------------------------------
class RefitConfig(_Section):
    """Periodic refit of the baseline from recent quiet sessions, gated (``tracewatch run``
    and ``tracewatch baselines refit``)."""

    # the daemon refits by itself only when enabled; the command works either way
    enabled: bool = False
    # how often the daemon fits a candidate (wall-clock seconds; the schedule survives restarts)
    interval_s: float = Field(default=86_400.0, ge=60)
    # quiet sessions kept per source for the next refit (a uniform sample of those since the
    # current baseline was put in use)
    pool_size: int = Field(default=5000, ge=20, le=1_000_000)
    # fewer quiet sessions than this in the pool (all sources): no candidate is fitted
    min_sessions: int = Field(default=1000, ge=20)
    # the most recent share of each source's pool is held out to test the candidate's false alarms
    holdout_share: float = Field(default=0.2, gt=0, lt=0.9)
    # the holdout gate fails when a false-alarm count this unlikely (or less) under
    # [model] false_alarm_rate is observed (one-sided binomial test)
    significance: float = Field(default=0.01, gt=0, lt=0.5)
    # make a candidate that passes every gate current (false: save it for `baselines use`)
    promote: bool = True
    # sessions whose alert joined an incident labelled expected are pooled (learned as normal) too
    learn_expected: bool = True
    # open and acknowledged incidents (not only those labelled a known problem) must still be flagged
    gate_open_incidents: bool = True
    seed: int = 0


class Config(_Section):
    state_dir: Path = Path("./tracewatch-state")
    sources: list[SourceConfig] = Field(default_factory=list)
    sessions: SessionsConfig = SessionsConfig()
    templates: TemplatesConfig = TemplatesConfig()
    features: FeaturesConfig = FeaturesConfig()
    model: ModelConfig = ModelConfig()
    server: ServerConfig = ServerConfig()
    otlp: OtlpConfig = OtlpConfig()  # tracewatch/service/otlp_http.py
    daemon: DaemonConfig = DaemonConfig()
    incidents: IncidentsConfig = IncidentsConfig()  # tracewatch/alerts/incidents.py
    notify: NotifyConfig = NotifyConfig()  # tracewatch/alerts/sinks.py
    triage: TriageConfig = TriageConfig()  # tracewatch/triage.py
    refit: RefitConfig = RefitConfig()  # tracewatch/refit.py
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
        otlp = self.otlp
        for key, fmt in (("traces_source", "otlp-json"), ("logs_source", "otlp-logs-json")):
            name = getattr(otlp, key)
            if name is None:
                continue
            src = next((s for s in self.sources if s.name == name), None)
            if src is None:
                raise ValueError(f"otlp.{key}: no source named {name!r}")
            if src.format != fmt:
                raise ValueError(f"otlp.{key}: source {name!r} must have format = \"{fmt}\"")
            if src.paths:
                raise ValueError(f"otlp.{key}: source {name!r} is fed over HTTP; give it no paths")
        if otlp.enabled and otlp.traces_source is None and otlp.logs_source is None:
            raise ValueError("otlp: enabled, but neither traces_source nor logs_source names a source")
        return self

    def receives_otlp(self, name: str) -> bool:
        """Whether source ``name`` is fed by the OTLP/HTTP receiver rather than files."""
        return self.otlp.enabled and name in (self.otlp.traces_source, self.otlp.logs_source)

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
        raise ConfigError(f"{origin}: {_describe(exc)}") from exc


def load_config(path: str | Path) -> Config:
    """Read and validate a TOML config file; relative ``state_dir`` and ``paths`` are taken from the file's folder."""
    path = Path(path)
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read config file: {exc.strerror or exc}") from exc
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{path}: not valid TOML: {exc}") from exc
    cfg = parse_config(data, origin=str(path))
    base = path.parent.resolve()
    if not cfg.state_dir.is_absolute():
        cfg = cfg.model_copy(update={"state_dir": (base / cfg.state_dir).resolve()})
    # source globs are taken from the config file's folder too, so a command works from any directory
    sources = [s.model_copy(update={"paths": [str(base / g) if not Path(g).is_absolute() else g
                                              for g in s.paths]}) if s.paths else s
               for s in cfg.sources]
    return cfg.model_copy(update={"sources": sources})


def adhoc_config(fmt: str, *, state_dir: Path | None = None) -> Config:
    """The config used when a command gets ``--format FMT`` and no file: the whole line is the message."""
    if fmt not in FORMATS:
        raise ConfigError(f"--format: unknown format {fmt!r}; choose one of {', '.join(FORMATS)}")
    data: dict = {"sources": [{"name": "input", "format": fmt}]}
    if state_dir is not None:
        data["state_dir"] = str(state_dir)
    return parse_config(data, origin="--format")
