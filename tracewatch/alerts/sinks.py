"""Notification sinks: each incident's notifications (opened, escalated, resolved) leave for a
generic JSON webhook and for a Prometheus Alertmanager, per incident — never per alert.

Stage: incidents → **sinks** (reads the store's outbox; never imports the tracker). The tracker queues notifications in the store's outbox in the
same transaction as the incident change, so the outbox *is* the disk spool: while a receiver
is down, notifications wait there (across restarts) and go out in order when it is back.
Each sink keeps its own cursor in the store, moved on only after the receiver answered 2xx.
A receiver that is unreachable, times out or answers 408/425/429/5xx is retried with
exponential backoff (``retry_initial_s`` doubling up to ``retry_max_s``); any other 4xx means
the receiver refuses that notification for good: it is counted as rejected and logged.
Nothing is lost or sent twice across a clean restart; after a crash between a receiver's 2xx
and the cursor's commit one notification may go out again — each carries a stable
``notification_id`` (webhook) or the same labels (Alertmanager deduplicates by labels).

Alertmanager API v2 (``POST <url>/api/v2/alerts``, a list of postable alerts: ``labels``,
``annotations``, ``startsAt``, ``endsAt``, ``generatorURL``): an open incident is a firing
alert (no ``endsAt``) and is sent again every ``resend_s`` while it is open or acknowledged,
as Alertmanager expects of its clients; a resolved one is sent once with ``endsAt``.
HTTP goes through :mod:`urllib.request`; proxies from the environment are honoured except for
loopback receivers, and redirects are not followed.
"""

from __future__ import annotations

import ipaddress
import logging
import sqlite3
import threading
import time
import urllib.error
import urllib.request
from collections.abc import Callable
from datetime import datetime, timezone
from urllib.parse import urlsplit

import orjson

from .. import __version__
from ..config import Config, NotifyConfig
from ..errors import TracewatchError
from .store import FIRING, IncidentStore
from .summary import notice, rate_text

log = logging.getLogger("tracewatch.notify")

ALERTNAME = "TracewatchIncident"
PAYLOAD_VERSION = 1
RETRY_STATUS = {408, 425, 429}
BATCH = 100
PRUNE_EVERY_S = 3600.0
MAX_WAIT_S = 1.0  # the notifier thread looks at the outbox at least this often


class DeliveryError(Exception):
    """A notification did not get through; ``retry`` says whether trying again may help."""

    def __init__(self, message: str, *, retry: bool) -> None:
        super().__init__(message)
        self.retry = retry


def rfc3339(ts: float) -> str:
    """RFC 3339 UTC time with milliseconds, as Alertmanager's API expects (``date-time``)."""
    return datetime.fromtimestamp(ts, tz=timezone.utc).isoformat(timespec="milliseconds").replace("+00:00", "Z")


class _NoRedirect(urllib.request.HTTPRedirectHandler):
    def redirect_request(self, *args, **kwargs):  # a redirect is an answer, not a detour
        return None


def _is_loopback(host: str | None) -> bool:
    if host is None:
        return False
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def post_json(url: str, body, *, timeout: float) -> int:
    """POST ``body`` as JSON; returns the 2xx status or raises :class:`DeliveryError`."""
    data = orjson.dumps(body, option=orjson.OPT_SERIALIZE_NUMPY)
    handlers: list = [_NoRedirect()]
    if _is_loopback(urlsplit(url).hostname):
        handlers.append(urllib.request.ProxyHandler({}))
    opener = urllib.request.build_opener(*handlers)
    req = urllib.request.Request(url, data=data, method="POST", headers={
        "Content-Type": "application/json", "User-Agent": f"tracewatch/{__version__}"})
    try:
        with opener.open(req, timeout=timeout) as resp:
            resp.read(65536)
            return resp.status
    except urllib.error.HTTPError as exc:
        code = exc.code
        exc.close()
        raise DeliveryError(f"{url} answered HTTP {code}", retry=code in RETRY_STATUS or code >= 500) from exc
    except (urllib.error.URLError, OSError, ValueError) as exc:
        reason = getattr(exc, "reason", exc)
        raise DeliveryError(f"{url}: {reason}", retry=True) from exc


# -- the two sinks -------------------------------------------------------------------------------------
class WebhookSink:
    """A generic JSON webhook: one POST per notification.

    Body: ``{"version", "notification_id", "event", "incident", "url", "sent_at"}`` where
    ``event`` is ``opened``, ``escalated`` or ``resolved`` and ``incident`` is the incident
    as it was when the notification was queued."""

    name = "webhook"

    def __init__(self, url: str, *, page_url: str, store_id: str, timeout: float) -> None:
        self.url, self.page_url, self.store_id, self.timeout = url, page_url, store_id, timeout

    def body(self, row_id: int, event: str, incident: dict) -> dict:
        return {"version": PAYLOAD_VERSION, "notification_id": f"{self.store_id}:{row_id}", "event": event,
                "incident": incident, "url": f"{self.page_url}/incidents/{incident['id']}",
                "sent_at": rfc3339(time.time())}

    def send(self, row_id: int, event: str, incident: dict) -> None:
        post_json(self.url, self.body(row_id, event, incident), timeout=self.timeout)

    def refresh(self, firing: list[dict], now: float) -> None:
        """Webhooks are event-driven: nothing to re-send."""


class AlertmanagerSink:
    """Prometheus Alertmanager API v2: incidents as alerts, labelled stably by incident."""

    name = "alertmanager"

    def __init__(self, url: str, *, page_url: str, store_id: str, timeout: float,
                 labels: dict[str, str] | None = None) -> None:
        self.url = f"{url}/api/v2/alerts"
        self.page_url, self.store_id, self.timeout = page_url, store_id, timeout
        self.labels = dict(labels or {})

    def alert(self, incident: dict, now: float) -> dict:
        """One postable alert. Labels identify it (so they never change while it lives);
        annotations carry what changes."""
        labels = {**self.labels, "alertname": ALERTNAME, "incident": str(incident["id"]),
                  "tracewatch_store": self.store_id[:12]}
        sources = incident.get("sources") or []
        annotations = {
            "summary": incident["title"],
            "description": f"{incident['count']} alert(s) from {', '.join(sources) or 'unknown sources'}"
                           + "".join(f"\n{line}" for line in incident.get("diff") or []),
            "status": incident["status"],
            "alerts": str(incident["count"]),
            "sources": ", ".join(sources),
            "first_seen": rfc3339(incident["first_seen"]),
            "last_seen": rfc3339(incident["last_seen"]),
        }
        if "rate" in incident:  # (notifications queued by an older tracewatch have no rate)
            annotations["severity"] = incident["severity"]  # an annotation: it changes while the alert lives
            annotations["rate"] = rate_text(incident)
        out = {"labels": labels, "annotations": annotations, "startsAt": rfc3339(incident["first_seen"]),
               "generatorURL": f"{self.page_url}/incidents/{incident['id']}"}
        if incident["status"] not in FIRING:
            out["endsAt"] = rfc3339(max(incident.get("status_changed") or now, incident["first_seen"]))
        return out

    def send(self, row_id: int, event: str, incident: dict) -> None:
        post_json(self.url, [self.alert(incident, time.time())], timeout=self.timeout)

    def refresh(self, firing: list[dict], now: float) -> None:
        if firing:
            post_json(self.url, [self.alert(i, now) for i in firing], timeout=self.timeout)


# -- the notifier --------------------------------------------------------------------------------------
class Notifier:
    """Delivers the outbox to every sink, in order, with backoff; re-sends firing incidents.

    :meth:`run_once` does one round (tests call it with their own clock); :meth:`start`
    runs rounds in a thread until :meth:`stop`; :meth:`wake` asks for a round now."""

    def __init__(self, store: IncidentStore, sinks: list, *, retry_initial_s: float = 1.0,
                 retry_max_s: float = 300.0, resend_s: float = 60.0, clock: Callable[[], float] = time.time) -> None:
        self.store = store
        self.sinks = sinks
        self.retry_initial_s = retry_initial_s
        self.retry_max_s = retry_max_s
        self.resend_s = resend_s
        self.clock = clock
        self._next_try = {s.name: -float("inf") for s in sinks}  # a restart tries at once
        self._next_resend = {s.name: -float("inf") for s in sinks}
        self._next_prune = -float("inf")
        self.rounds = 0  # delivery rounds finished since the start
        self.retries = dict.fromkeys(self._next_try, 0)  # sink -> failed attempts that are retried
        for s in sinks:
            store.cursor(s.name)  # a new sink starts after the newest notification
        self._wake = threading.Event()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    @classmethod
    def from_config(cls, store: IncidentStore, cfg: Config) -> "Notifier":
        n: NotifyConfig = cfg.notify
        page = n.page_url or f"http://{cfg.server.listen}"
        common = {"page_url": page, "store_id": store.store_id, "timeout": n.timeout_s}
        sinks: list = []
        if n.webhook_url:
            sinks.append(WebhookSink(n.webhook_url, **common))
        if n.alertmanager_url:
            sinks.append(AlertmanagerSink(n.alertmanager_url, labels=n.alertmanager_labels, **common))
        return cls(store, sinks, retry_initial_s=n.retry_initial_s, retry_max_s=n.retry_max_s,
                   resend_s=n.resend_s)

    def backoff(self, attempts: int) -> float:
        return min(self.retry_max_s, self.retry_initial_s * 2 ** max(0, attempts - 1))

    def run_once(self, now: float | None = None) -> int:
        """Deliver what is due; returns how many notifications got through."""
        now = self.clock() if now is None else now
        sent = 0
        for sink in self.sinks:
            sent += self._deliver(sink, now)
        if now >= self._next_prune:
            self._next_prune = now + PRUNE_EVERY_S
            self.store.prune_outbox()
        self.rounds += 1
        return sent

    def _deliver(self, sink, now: float) -> int:
        name = sink.name
        if now < self._next_try[name]:
            return 0
        sent = 0
        cursor = self.store.cursor(name)["last_id"]
        while not self._stop.is_set():
            rows = self.store.outbox_after(cursor, BATCH)
            if not rows:
                break
            for row_id, event, incident in rows:
                if self._stop.is_set():
                    return sent
                if incident is None:  # a damaged outbox row: set aside, so the rest goes out
                    log.error("%s: notification %d in %s is damaged; set aside, not sent", name, row_id,
                              self.store.path)
                    self.store.delivered(name, row_id, rejected="damaged row in the incident store")
                    cursor = row_id
                    continue
                try:
                    sink.send(row_id, event, incident)
                except DeliveryError as exc:
                    if exc.retry:
                        self.retries[name] += 1
                        attempts = self.store.failed(name, str(exc))
                        self._next_try[name] = now + self.backoff(attempts)
                        log.warning("%s: %s; notification %d kept, attempt %d, next in %.0f s", name, exc,
                                    row_id, attempts, self._next_try[name] - now)
                        return sent
                    log.error("%s: %s; notification %d refused by the receiver, not retried", name, exc, row_id)
                    self.store.delivered(name, row_id, rejected=str(exc))
                else:
                    self.store.delivered(name, row_id)
                    sent += 1
                cursor = row_id
        if now >= self._next_resend[name]:
            firing = [notice(r) for r in self.store.notice_rows(firing=True, limit=2000)]
            try:
                sink.refresh(firing, now)
                self._next_resend[name] = now + self.resend_s
            except DeliveryError as exc:
                self._next_resend[name] = now + min(self.resend_s, self.retry_initial_s)
                log.warning("%s: re-sending %d firing incident(s) failed: %s", name, len(firing), exc)
        return sent

    # -- the thread ----------------------------------------------------------------------------------
    def wake(self) -> None:
        self._wake.set()

    def start(self) -> None:
        if self._thread is None and self.sinks:
            self._stop.clear()
            self._thread = threading.Thread(target=self._run, name="tracewatch-notify", daemon=True)
            self._thread.start()

    def _run(self) -> None:
        failing = ""
        while not self._stop.is_set():
            try:
                self.run_once()
                failing = ""
            except (TracewatchError, sqlite3.Error) as exc:  # the store: one line, again only when it changes
                if str(exc) != failing:
                    failing = str(exc)
                    log.error("notifier: %s; notifications wait in the outbox", exc)
            except Exception:  # a bug must not stop notifications for good; it is logged with its cause
                log.exception("notifier round failed")
            due = min([*self._next_try.values(), *self._next_resend.values()], default=0.0) - self.clock()
            self._wake.wait(max(0.01, min(MAX_WAIT_S, due)))
            self._wake.clear()

    def stop(self) -> None:
        """Finish the notification in flight (bounded by the timeout) and stop the thread."""
        self._stop.set()
        self._wake.set()
        if self._thread is not None:
            self._thread.join(timeout=max(5.0, 2 * max((getattr(s, "timeout", 5.0) for s in self.sinks), default=5)))
            self._thread = None

    def status(self) -> dict:
        """Per sink: its cursor (pending, attempts, delivered, rejected, last_error), the failed
        attempts retried and the delivery rounds finished since the start."""
        cursors = self.store.cursors()
        return {s.name: {**cursors.get(s.name, {}), "retries": self.retries[s.name], "rounds": self.rounds}
                for s in self.sinks}
