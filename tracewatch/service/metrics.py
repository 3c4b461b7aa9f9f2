"""Metrics: the daemon's Prometheus metrics, declared in one place.

Stage: reads the pipeline's plain counters (records, rejections, sessions, alerts) and the
follower's positions; hands Prometheus families to a registry, which the HTTP module exposes.
This module never imports the HTTP code.

Counters are read from a snapshot at scrape time (one source of truth: the pipeline's own
counters, which a checkpoint carries across restarts); the session score histogram is
observed as sessions are scored. Names follow DESIGN.md: ``tracewatch_`` prefix, base units,
counters end in ``_total``, labels bounded (source, reason, version — never a session key).

The snapshot is a dict with these keys (all optional):

    records, lines, sessions_scored, untimed {source: n}
    rejected, repaired, alerts               {(source, reason): n}
    reject_reasons                           {source: (reason, ...)} its format's rejection reasons
    sessions_open, sessions_evicted, baseline_reload_failures, alerts_replayed,
    alert_lines_damaged                      int
    baseline_version                         str
    sources                                  [source name, ...] (every configured one)
    files                                    [{"source", "lag_bytes", "lag_seconds"}, ...]
    checkpoint_time, checkpoint_seconds      when the last checkpoint was written (epoch), and
                                             how long it took
    refits                                   {outcome: n} baseline refits (tracewatch/refit.py)
    refit_pool                               {source: n} sessions held for the next refit
    incidents                                {status: n} incidents in the store
    notifications                            {sink: {"sent", "rejected", "retried", "pending"}}

Every series whose labels are known in advance exists from the start, at zero: per configured
source (and per alert reason, per repair reason, per rejection reason of its format), per incident
status, per configured sink — so rules and dashboards see a 0, not an absent series, before the
first alert or notification.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Sequence

from prometheus_client import (GCCollector, PlatformCollector, ProcessCollector, CollectorRegistry, Histogram,
                               disable_created_metrics)
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, Metric
from prometheus_client.registry import Collector

from .. import __version__
from ..alerts.alert import REASON_FAR, REASON_UNSEEN
from ..sources.files import INVALID_UTF8, LINE_TOO_LONG

# no `*_created` series beside counters and histograms: they double the series count and no rule
# here reads them (prometheus_client's switch is process-wide)
disable_created_metrics()

# session scores are distances in units of the nearest cluster's spread
SCORE_BUCKETS = (0.25, 0.5, 0.75, 1.0, 1.5, 2.0, 3.0, 5.0, 8.0, 13.0, 21.0, float("inf"))

_BY_SOURCE = (
    ("records", "tracewatch_records_total", "Records accepted from the source's files."),
    ("lines", "tracewatch_lines_total", "Lines read from the source's files."),
    ("sessions_scored", "tracewatch_sessions_scored_total", "Sessions closed and scored."),
    ("untimed", "tracewatch_records_untimed_total",
     "Records with a session key but no usable time (check the source's ts_format)."),
)
_BY_REASON = (  # key, name, help, the reasons known in advance (None: each source's format's own)
    ("rejected", "tracewatch_records_rejected_total",
     "Lines a format could not read as intended (most are still kept as whole-line records).", None),
    ("repaired", "tracewatch_lines_repaired_total",
     "Lines decoded with replacement characters or truncated to max_line_bytes.", (INVALID_UTF8, LINE_TOO_LONG)),
    ("alerts", "tracewatch_alerts_total", "Alerts raised, by reason (an alert may have several).",
     (REASON_FAR, REASON_UNSEEN)),
)
# the notification families, labelled by sink (name, help)
_SENT = ("tracewatch_notifications_sent_total", "Incident notifications the sink's receiver accepted.")
_FAILED = ("tracewatch_notifications_failed_total", "Incident notifications that did not get through: "
           "reason retried (unreachable, timeout, 408/425/429/5xx; tried again, counted since the start) or "
           "rejected (another 4xx; set aside for good).")
_PENDING = ("tracewatch_notifications_pending", "Incident notifications in the outbox not yet delivered to the sink.")
_PLAIN_COUNTERS = (
    ("sessions_evicted", "tracewatch_sessions_evicted_total",
     "Sessions closed early because max_open_sessions was reached."),
    ("baseline_reload_failures", "tracewatch_baseline_reload_failures_total",
     "New baselines refused (unreadable or corrupt); the old one was kept."),
    ("alerts_replayed", "tracewatch_alerts_replayed_total",
     "Alerts raised again after a restart and recognised as already in the journal."),
    ("alert_lines_damaged", "tracewatch_alert_journal_damaged_lines_total",
     "Lines of alerts.jsonl found damaged when the daemon opened it (skipped, left in the file)."),
)


class _SnapshotCollector(Collector):
    def __init__(self, snapshot: Callable[[], dict]) -> None:
        self.snapshot = snapshot

    def collect(self) -> Iterator[Metric]:
        snap = self.snapshot()
        sources = snap.get("sources", [])
        for key, name, doc in _BY_SOURCE:
            fam = CounterMetricFamily(name, doc, labels=["source"])
            for source, n in sorted({**dict.fromkeys(sources, 0), **snap.get(key, {})}.items()):
                fam.add_metric([source], n)
            yield fam
        for key, name, doc, known in _BY_REASON:
            fam = CounterMetricFamily(name, doc, labels=["source", "reason"])
            zeros = {(source, reason): 0 for source in sources
                     for reason in (known if known is not None else snap.get("reject_reasons", {}).get(source, ()))}
            for (source, reason), n in sorted({**zeros, **snap.get(key, {})}.items()):
                fam.add_metric([source, reason], n)
            yield fam
        yield from _incident_families(snap)
        for key, name, doc in _PLAIN_COUNTERS:
            yield CounterMetricFamily(name, doc, value=snap.get(key, 0))
        build = GaugeMetricFamily("tracewatch_build_info", "The running tracewatch (value 1).", labels=["version"])
        build.add_metric([__version__], 1)
        yield build
        yield GaugeMetricFamily("tracewatch_sessions_open", "Sessions open now.",
                                value=snap.get("sessions_open", 0))
        info = GaugeMetricFamily("tracewatch_baseline_info", "The baseline in use (value 1).", labels=["version"])
        if snap.get("baseline_version"):
            info.add_metric([snap["baseline_version"]], 1)
        yield info
        lag_b = GaugeMetricFamily("tracewatch_ingest_lag_bytes", "Bytes written to the source's files "
                                  "and not read yet.", labels=["source"])
        lag_s = GaugeMetricFamily("tracewatch_ingest_lag_seconds", "Age of the oldest unread data in "
                                  "the source's files (0 when caught up).", labels=["source"])
        files = GaugeMetricFamily("tracewatch_files_followed", "Files being followed.", labels=["source"])
        per: dict[str, list[float]] = {}
        for f in snap.get("files", []):
            row = per.setdefault(f["source"], [0, 0.0, 0])
            row[0] += f["lag_bytes"]
            row[1] = max(row[1], f["lag_seconds"])
            row[2] += 1
        for source in sorted(set(per) | set(snap.get("sources", []))):
            b, s, n = per.get(source, (0, 0.0, 0))
            lag_b.add_metric([source], b)
            lag_s.add_metric([source], s)
            files.add_metric([source], n)
        yield lag_b
        yield lag_s
        yield files
        # -- refit (tracewatch/refit.py) --
        refits = CounterMetricFamily("tracewatch_refits_total", "Baseline refits by outcome: promoted, "
                                     "passed (the gates, but not made current), refused (a gate failed), "
                                     "skipped (too few quiet sessions), error.", labels=["outcome"])
        for outcome, n in sorted(snap.get("refits", {}).items()):
            refits.add_metric([outcome], n)
        yield refits
        pool = GaugeMetricFamily("tracewatch_refit_pool_sessions", "Quiet sessions held for the next "
                                 "baseline refit.", labels=["source"])
        for source, n in sorted(snap.get("refit_pool", {}).items()):
            pool.add_metric([source], n)
        yield pool
        if snap.get("checkpoint_time"):
            yield GaugeMetricFamily("tracewatch_checkpoint_timestamp_seconds",
                                    "When the last checkpoint was written.", value=snap["checkpoint_time"])
            yield GaugeMetricFamily("tracewatch_checkpoint_duration_seconds",
                                    "How long writing the last checkpoint took.",
                                    value=snap.get("checkpoint_seconds", 0.0))


def _incident_families(snap: dict) -> Iterator[Metric]:
    """Incidents by status and notifications by sink (tracewatch/service/incidents.py)."""
    if "incidents" in snap:
        fam = GaugeMetricFamily("tracewatch_incidents", "Incidents in the store by status: open, acknowledged, "
                                "resolved, expected.", labels=["status"])
        for status, n in snap["incidents"].items():
            fam.add_metric([status], n)
        yield fam
    sinks = snap.get("notifications", {})
    sent, failed, pending = (CounterMetricFamily(*_SENT, labels=["sink"]),
                             CounterMetricFamily(*_FAILED, labels=["sink", "reason"]),
                             GaugeMetricFamily(*_PENDING, labels=["sink"]))
    for sink, c in sorted(sinks.items()):
        sent.add_metric([sink], c["sent"])
        failed.add_metric([sink, "retried"], c["retried"])
        failed.add_metric([sink, "rejected"], c["rejected"])
        pending.add_metric([sink], c["pending"])
    yield from (sent, failed, pending)


class DaemonMetrics:
    """All of the daemon's metrics on ``registry``; ``snapshot`` is read at every scrape; the
    score histogram of each of ``sources`` exists from the start."""

    def __init__(self, registry: CollectorRegistry, snapshot: Callable[[], dict], sources: Sequence[str] = ()) -> None:
        self.registry = registry
        self.scores = Histogram("tracewatch_session_score", "Scores of the sessions scored "
                                "(distance to the nearest normal cluster, in units of its spread).",
                                ["source"], buckets=SCORE_BUCKETS, registry=registry)
        for source in sources:
            self.scores.labels(source)
        registry.register(_SnapshotCollector(snapshot))
        # the standard process_*, python_info and python_gc_* families, on this registry
        ProcessCollector(registry=registry)
        PlatformCollector(registry=registry)
        GCCollector(registry=registry)

    def observe_score(self, source: str, score: float) -> None:
        self.scores.labels(source).observe(score)
