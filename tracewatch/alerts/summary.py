"""Summaries: an incident said in words an on-call engineer can act on.

Stage: alerts → incidents → **summary** → page, CLI, notifications. The title comes from the
strongest explanation of the representative alert (:func:`strongest`, also the key alerts are
grouped by, :func:`signature`), in this order: an event never seen at fit,
a step repeated many times in a row, an essential step missing, a step order never seen, a
step more frequent than normal, and only then "unlike the baseline"; beside the template it
shows one example line of the first alert with every value redacted (:func:`redact_value`).
Every form carries the incident's rate, reach and severity (:func:`reach`). The detail adds the
step-by-step difference from the closest normal session, what the incident's alerts share,
its alerts over time (:func:`timeline`) and a few raw sample lines — bounded, and passed
through the redaction patterns again so a pattern added later also covers samples stored before.
"""

from __future__ import annotations

import ipaddress
import re
from collections.abc import Callable

from ..templates import WILDCARD
from .alert import REDACTED

MAX_TEMPLATE = 100  # characters of a template quoted in a title
MAX_SAMPLE = 500  # characters of one sample line
MAX_DIFF = 20
DIFF_IN_NOTES = 5  # steps of the difference a notification carries
SHARED = 0.5  # a reason / n-gram / event is "shared" when at least half the alerts have it
ARROW = " → "

_REPEATED = re.compile(r"^repeated ×(\d+)(?: \(normally ×(\d+)\))?: (.*)$")


def quote(template: str, limit: int = MAX_TEMPLATE) -> str:
    text = " ".join(template.split())
    return f"'{text if len(text) <= limit else text[:limit - 1] + '…'}'"


def _more(items: list, shown: int = 1) -> str:
    return f" (+{len(items) - shown} more)" if len(items) > shown else ""


def strongest(alert: dict) -> tuple[str, str, str]:
    """The strongest explanation of ``alert`` as (kind, what it is about, the title's rest):
    kind is one of "unseen", "retry", "missing", "order", "frequent", "unlike"."""
    unseen = sorted(alert.get("unseen_events") or [], key=lambda u: -u.get("count", 1))
    if unseen:
        return "unseen", unseen[0]["template"], _more(unseen)
    repeats = []
    for line in alert.get("diff") or []:
        m = _REPEATED.match(line)
        if m:
            times, normally = int(m.group(1)), int(m.group(2) or 1)
            if times >= 3 and times > 2 * normally:
                repeats.append((times, m.group(3)))
    if repeats:
        times, template = max(repeats)
        return "retry", template, f" repeated {times}×{_more(repeats)}"
    missing = [m["ngram"] for m in alert.get("missing") or [] if ARROW not in m["ngram"]]
    if missing:
        return "missing", missing[0], _more(missing)
    unexpected = alert.get("unexpected") or []
    new_order = [u["ngram"] for u in unexpected if not u.get("seen_at_fit", True) and ARROW in u["ngram"]]
    if new_order:
        a, _, b = new_order[0].partition(ARROW)
        return "order", f"{a}{ARROW}{b.split(ARROW)[0]}", ""
    frequent = [u["ngram"] for u in unexpected if ARROW not in u["ngram"]]
    if frequent:
        return "frequent", frequent[0], ""
    return "unlike", str(alert.get("cluster", "?")), ""


def signature(alert: dict) -> str:
    """What is wrong, as a key alerts are grouped by: the source and the kind and subject of the
    strongest explanation ("" when that is only "unlike the baseline", which has no subject)."""
    kind, about, _ = strongest(alert)
    return "" if kind == "unlike" else f"{alert.get('source', '?')}\x1f{kind}\x1f{about}"


# -- the example in a title: one real value, redacted ----------------------------------------------------
HIDDEN = REDACTED  # as the configured redaction patterns write it
# hidden whole: an e-mail address (anything with an @), an IP address (with or without a port), a
# token (16 or more letters, digits and +/=_.- holding both a letter and a digit)
_TOKEN = re.compile(r"(?=\S*[A-Za-z])(?=\S*\d)[A-Za-z0-9+/=_.\-]{16,}")
_HOST_PORT = re.compile(r"^\[?([0-9A-Fa-f:.]+?)\]?(?::\d{1,5})?$")
_EXAMPLED = ("unseen", "retry", "frequent")  # the kinds whose subject is a line of the session
_EG = " (e.g. "


def _is_ip(value: str) -> bool:
    for text in (value, *(m.group(1) for m in [_HOST_PORT.match(value)] if m)):
        try:
            ipaddress.ip_address(text)
            return True
        except ValueError:
            pass
    return False


def redact_value(value: str) -> str:
    """One variable value as a title shows it: hidden whole when it looks like an e-mail address,
    an IP address or a token (or the configured patterns hid part of it); otherwise its first and
    last characters around "…" ("4512" → "4…2"), and "…" alone for one or two characters.
    Surrounding quotes stay."""
    if len(value) >= 2 and value[0] == value[-1] and value[0] in "\"'":
        return value[0] + redact_value(value[1:-1]) + value[0]
    if "@" in value or HIDDEN in value or _TOKEN.fullmatch(value) or _is_ip(value):
        return HIDDEN
    return "…" if len(value) <= 2 else f"{value[0]}…{value[-1]}"


def _pattern(template: str) -> re.Pattern:
    """A template as a regex over a raw line: its words in order, each ``<var>`` a group."""
    var = r'("[^"]*"|\S+?)'
    words = ["".join(var if part == WILDCARD else re.escape(part) for part in re.split(f"({WILDCARD})", w))
             for w in template.split()]
    return re.compile(r"(?<!\S)" + r"\s+".join(words) + r"(?!\S)")


def example(template: str, alert: dict) -> str | None:
    """``template`` filled in with the values of the first of ``alert``'s sample lines that it
    matches, each redacted (:func:`redact_value`); None when it has no variable or no sample shows it."""
    if WILDCARD not in template:
        return None
    pattern = _pattern(template)
    for line in alert.get("samples") or []:
        m = pattern.search(line)
        if m:
            values = iter(m.groups())
            return re.sub(re.escape(WILDCARD), lambda _: redact_value(next(values)), " ".join(template.split()))
    return None


def title(alert: dict) -> str:
    """One line naming the strongest explanation of ``alert``, with an example where a sample
    line of it shows the template's values: "never-seen event 'courier <var> authenticated' (e.g.
    courier 4…2 authenticated)". Missing steps have none (the session has no line of them)."""
    head = headline(alert)
    kind, about, _ = strongest(alert)
    if kind in _EXAMPLED:
        shown = example(about, alert)
        if shown is not None:
            return f"{head}{_EG}{quote(shown)[1:-1]})"
    return head


def retitle(old: str, alert: dict) -> str:
    """The title for a new representative ``alert``: while it names the same template as the
    old title, the old title's example stays (the first alert's) beside the new headline
    ("repeated 39×" may change); else :func:`title`."""
    kind, about, _ = strongest(alert)
    head = headline(alert)
    at = head.find(quote(about))
    if kind in _EXAMPLED and at >= 0 and old.startswith(head[:at + len(quote(about))]):
        cut = old.find(_EG, at + len(quote(about)))
        if cut >= 0:
            return head + old[cut:]
    return title(alert)


def headline(alert: dict) -> str:
    """The title without its example."""
    kind, about, rest = strongest(alert)
    if kind == "unseen":
        return f"never-seen event {quote(about)}{rest}"
    if kind == "retry":
        return f"retry of {quote(about)}{rest}"
    if kind == "missing":
        return f"step {quote(about)} missing{rest}"
    if kind == "order":
        a, _, b = about.partition(ARROW)
        return f"step order never seen: {quote(a, 60)} then {quote(b, 60)}"
    if kind == "frequent":
        return f"step {quote(about)} more frequent than normal"
    return f"session unlike the baseline (nearest normal group #{about})"


# -- rate, reach and severity -------------------------------------------------------------------------
# (severity, at least this many alerts, and at least this share of the sessions, or this many sources),
# the first that holds; otherwise "low". tracewatch's own rule of thumb (README, Incidents).
SEVERITY_RULE = (("critical", 10, 0.20, 3), ("high", 3, 0.02, 2))


def severity(alerts: int, share: float | None, sources: int) -> str:
    """low, high or critical by :data:`SEVERITY_RULE` (a share of None counts as none)."""
    for name, least, least_share, wide in SEVERITY_RULE:
        if alerts >= least and ((share or 0.0) >= least_share or sources >= wide):
            return name
    return "low"


# the shortest window an incident's rate is measured over: its last RATE_MINUTES minutes at least,
# so one alert reads "1 of 40 sessions in 10 min", not "1 of 1 in 1 min" (the store counts the
# sessions of the window rate_minutes gives)
RATE_MINUTES = 10


def rate_minutes(first_seen: float, last_seen: float) -> tuple[int, int]:
    """The first and last minute (as minute numbers) of an incident's rate window."""
    last = int(last_seen // 60)
    return min(int(first_seen // 60), last - RATE_MINUTES + 1), last


def reach(incident: dict) -> dict:
    """How fast and how wide an incident hits. Rate: its alerts against the sessions scored of
    its sources in the minutes of its window (first to last alert, and at least the last
    :data:`RATE_MINUTES`; the store reads them as ``sessions``). Reach: the share of those sessions that are its alerts, and its number of
    sources. Severity from both (:data:`SEVERITY_RULE`). With no sessions counted (an incident
    older than the counts) the share is None."""
    count = int(incident.get("count") or 0)
    sessions = int(incident.get("sessions") or 0)
    first, last = rate_minutes(incident["first_seen"], incident["last_seen"])
    minutes = last - first + 1
    share = round(min(1.0, count / sessions), 4) if sessions else None
    n_sources = len((incident.get("stats") or {}).get("sources") or incident.get("sources") or ())
    return {"severity": severity(count, share, n_sources),
            "rate": {"alerts": count, "sessions": sessions, "window_s": 60 * minutes},
            "reach": {"share": share, "sources": n_sources}}


def duration(seconds: float) -> str:
    """A length of time in words: "10 min", "3.0 h", "2 d"."""
    minutes = round(seconds / 60)
    if minutes < 120:
        return f"{minutes} min"
    return f"{minutes / 60:.1f} h" if minutes < 48 * 60 else f"{minutes / 1440:.3g} d"


def share_text(share: float) -> str:
    """A share of sessions as a percentage: "4%", and "0.4%" below one percent."""
    return f"{share:.0%}" if share >= 0.01 else f"{share:.1%}"


def rate_text(d: dict) -> str:
    """"12 of 300 sessions of locker-api in 10 min (4%)" for the list or detail form."""
    rate, share = d["rate"], d["reach"]["share"]
    of = ", ".join(d.get("sources") or []) or "its sources"
    if share is None:
        return f"{rate['alerts']} alerts in {duration(rate['window_s'])} (sessions of {of} not counted)"
    pct = share_text(share)
    return f"{rate['alerts']} of {rate['sessions']} sessions of {of} in {duration(rate['window_s'])} ({pct})"


# -- alerts over time ---------------------------------------------------------------------------------
BUCKETS_S = (60, 300, 600, 1800, 3600, 3 * 3600, 6 * 3600, 86_400)  # the widths a bar may have
MAX_BARS = 48


def bucket_for(first: float, last: float) -> int:
    """The narrowest bar of :data:`BUCKETS_S` that shows ``first`` … ``last`` in at most
    :data:`MAX_BARS` bars (whole days per bar beyond)."""
    for b in BUCKETS_S:
        if int(last // b) - int(first // b) < MAX_BARS:
            return b
    return 86_400 * -(-int(last - first) // (86_400 * (MAX_BARS - 1)))


def timeline(first: float, last: float, alert_counts: Callable[[int], dict[int, int]]) -> dict:
    """Alerts per bar from ``first`` to ``last``: ``{"bucket_s", "start", "alerts": [n, …]}``;
    ``alert_counts(bucket_s)`` gives the alerts per bucket index (as the store counts them)."""
    b = bucket_for(first, last)
    lo, hi = int(first // b), int(last // b)
    got = alert_counts(b)
    return {"bucket_s": b, "start": lo * b, "alerts": [got.get(i, 0) for i in range(lo, hi + 1)]}


def shared(stats: dict, count: int) -> dict[str, list[dict]]:
    """What at least half of an incident's alerts have in common, most common first."""
    out: dict[str, list[dict]] = {}
    for key in ("reasons", "unseen", "unexpected", "missing", "sources"):
        items = sorted((stats.get(key) or {}).items(), key=lambda kv: (-kv[1], kv[0]))
        out[key] = [{"text": k, "alerts": n, "share": round(n / count, 3)} for k, n in items
                    if count and n / count >= SHARED]
    return out


def detail(incident: dict, *, max_samples: int = 5, redact: Callable[[str], str] | None = None,
           alert_counts: Callable[[int], dict[int, int]] | None = None) -> dict:
    """The incident with what a person needs to act: title, rate and severity, step difference,
    what its alerts share, the closest normal session, bounded, redacted sample lines, and (given
    ``alert_counts``, see :func:`timeline`) its alerts over time."""
    rep = incident.get("representative") or {}
    samples = [s if len(s) <= MAX_SAMPLE else s[:MAX_SAMPLE - 1] + "…" for s in (rep.get("samples") or [])]
    if redact is not None:
        samples = [redact(s) for s in samples]
    diff = list(rep.get("diff") or [])
    if len(diff) > MAX_DIFF:
        diff = diff[:MAX_DIFF] + [f"… {len(diff) - MAX_DIFF} more differences"]
    return {
        **{k: v for k, v in incident.items() if k not in ("representative", "stats")},
        **reach(incident),
        "shared": shared(incident.get("stats") or {}, incident.get("count", 0)),
        "sources": sorted((incident.get("stats") or {}).get("sources", {})),
        "diff": diff,
        "closest_normal": list(rep.get("closest_normal") or [])[:200],
        "samples": samples[:max_samples],
        **({"timeline": timeline(incident["first_seen"], incident["last_seen"], alert_counts)}
           if alert_counts is not None else {}),
        "representative": {k: rep.get(k) for k in ("alert_id", "source", "session_key", "score", "p_value",
                                                     "reasons", "cluster", "events", "baseline_version",
                                                     "start", "end")},
    }


def brief(incident: dict) -> dict:
    """The list form: no representative, sources as a list."""
    stats = incident.get("stats") or {}
    out = {k: v for k, v in incident.items() if k not in ("representative", "stats")}
    out["sources"] = sorted(stats.get("sources", {}))
    out["reasons"] = sorted(stats.get("reasons", {}))
    out.update(reach(incident))
    return out


def notice(row: dict) -> dict:
    """The form notifications carry: the list form and the first steps of the representative's
    difference (``row["diff"]``, as :meth:`IncidentStore.notice_rows` reads it)."""
    return {**brief({k: v for k, v in row.items() if k != "diff"}), "diff": list(row.get("diff") or [])[:DIFF_IN_NOTES]}


# -- plain text (the CLI) ----------------------------------------------------------------------------
_CONTROL = re.compile(r"[\x00-\x08\x0b-\x1f\x7f-\x9f]")


def safe(text) -> str:
    """Log-derived text for a terminal: control characters (escape sequences) become '?'."""
    return _CONTROL.sub("?", str(text))


def _utc(ts: float | None) -> str:
    from datetime import datetime, timezone

    return "-" if ts is None else datetime.fromtimestamp(ts, tz=timezone.utc).strftime("%Y-%m-%d %H:%M:%S")


def table(rows: list[dict], *, width: int = 60) -> str:
    """A compact table of incidents (the list form from :func:`brief`)."""
    if not rows:
        return "no incidents"
    out = [f"{'ID':>5}  {'STATUS':<12}  {'ALERTS':>6}  {'OF SESSIONS':>11}  {'SEVERITY':<8}  {'LAST SEEN (UTC)':<19}  "
           f"{'SOURCES':<16}  TITLE"]
    for r in rows:
        sources = safe(",".join(r.get("sources") or []))
        sources = sources if len(sources) <= 16 else sources[:15] + "…"
        t = safe(r["title"])
        share = (r.get("reach") or {}).get("share")  # (none from an older daemon's API)
        of = "-" if share is None else f"{share_text(share)} of {r['rate']['sessions']}"
        out.append(f"{r['id']:>5}  {r['status']:<12}  {r['count']:>6}  {of:>11}  {r.get('severity', '-'):<8}  "
                   f"{_utc(r['last_seen']):<19}  {sources:<16}  {t if len(t) <= width else t[:width - 1] + '…'}")
    return "\n".join(out)


def text(d: dict) -> str:
    """One incident in detail (the form from :func:`detail`), for a terminal."""
    rep = d.get("representative") or {}
    lines = [f"incident #{d['id']}: {safe(d['title'])}",
             f"  status      {d['status']}" + (f" (by {safe(d['status_by'])})" if d.get("status_by") else ""),
             f"  severity    {d.get('severity', '-')}",
             f"  alerts      {safe(rate_text(d))}, from {d['reach']['sources']} source(s)" if "rate" in d
             else f"  alerts      {d['count']}",
             f"  first seen  {_utc(d['first_seen'])} UTC",
             f"  last seen   {_utc(d['last_seen'])} UTC",
             f"  sources     {safe(', '.join(d.get('sources') or []))}",
             f"  represented by session {safe(rep.get('session_key'))} of {safe(rep.get('source'))} "
             f"(alert {rep.get('alert_id')}, score {rep.get('score')})"]
    if d.get("note"):
        lines.append(f"  note        {safe(d['note'])}")
    if d.get("timeline"):
        lines += timeline_text(d["timeline"])
    if d.get("diff"):
        lines.append("difference from the closest normal session:")
        lines += [f"  {safe(x)}" for x in d["diff"]]
    for key, label in (("unseen", "never seen before"), ("unexpected", "more frequent than normal"),
                       ("missing", "expected but missing")):
        items = (d.get("shared") or {}).get(key) or []
        if items:
            lines.append(f"shared by most alerts — {label}:")
            lines += [f"  {safe(i['text'])}  ({i['share']:.0%})" for i in items[:10]]
    if d.get("samples"):
        lines.append("sample lines (redacted):")
        lines += [f"  {safe(s)}" for s in d["samples"]]
    return "\n".join(lines)


def timeline_text(tl: dict, *, width: int = 40) -> list[str]:
    """A timeline (:func:`timeline`) as one line per bar: its start (UTC), a bar, the count."""
    b, alerts = tl["bucket_s"], tl["alerts"]
    top = max(alerts, default=0) or 1
    lines = [f"alerts over time ({duration(b)} per bar, UTC):"]
    for i, n in enumerate(alerts):
        at = _utc(tl["start"] + i * b)
        bar = "█" * max(1 if n else 0, round(width * n / top))
        lines.append(f"  {at[5:16] if b < 86_400 else at[:10]}  {bar}{' ' if n else ''}{n}")
    return lines


def _num(x, digits: int = 3) -> str:
    return f"{x:.{digits}f}" if isinstance(x, (int, float)) else str(x)


def alert_text(alert: dict) -> str:
    """One alert for a terminal (``tracewatch score --output text``): what is wrong first, then
    the session, the evidence and the difference from the closest normal session."""
    reasons = ", ".join(alert.get("reasons") or []) or "no alert (--all)"
    lines = [f"{safe(alert.get('source'))} {safe(alert.get('session_key'))}: {safe(title(alert))}",
             f"  when        {_utc(alert.get('start'))} → {_utc(alert.get('end'))} UTC, "
             f"{alert.get('events')} events, closed by {alert.get('closed_by') or '-'}",
             f"  why         {reasons}; score {_num(alert.get('score'))} (threshold "
             f"{_num(alert.get('threshold'))}), p-value {_num(alert.get('p_value'), 4)}"]
    for u in (alert.get("unseen_events") or [])[:5]:
        lines.append(f"  never seen  {quote(safe(u['template']))} ×{u.get('count', 1)}")
    diff = alert.get("diff") or []
    if diff:
        lines.append("  against the closest normal session:")
        lines += [f"    {safe(x)}" for x in diff[:MAX_DIFF]]
        if len(diff) > MAX_DIFF:
            lines.append(f"    … {len(diff) - MAX_DIFF} more")
    for s in alert.get("samples") or []:
        lines.append(f"  | {safe(s)[:MAX_SAMPLE]}")
    return "\n".join(lines)
