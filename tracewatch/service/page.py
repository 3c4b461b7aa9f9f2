"""The incident page: HTML for the on-call engineer, readable without JavaScript.

Stage: incidents → **page** (served by :mod:`tracewatch.service.incidents_api`). Two views:
the list (counts and titles) and one incident (step difference, what its alerts share, the
closest normal session, redacted sample lines). Both refresh themselves with
``<meta http-equiv="refresh">``. Logs are attacker-controlled input: every string that comes
from them — titles, templates, sample lines, source names, notes — goes through
:func:`html.escape`; the page has no script at all, and is served with a Content-Security-Policy
that forbids scripts.
"""

from __future__ import annotations

import html
import time
from urllib.parse import urlencode
from datetime import datetime, timezone

from ..alerts.store import STATUSES
from ..alerts.summary import duration, rate_text, share_text

CAUTION = ("This page shows text taken from logs (after the configured redaction patterns); logs can hold "
           "secrets and personal data. Keep this port on loopback or behind your own access control. "
           "A quiet page is not proof of health: tracewatch sees only the logs it follows, and misses what "
           "its baseline has learned as normal.")
CSP = ("default-src 'none'; style-src 'unsafe-inline'; base-uri 'none'; form-action 'none'; "
       "frame-ancestors 'none'")

_STYLE = """
body{font:15px/1.45 system-ui,sans-serif;margin:1.5em auto;max-width:72em;padding:0 1em;color:#1b1b1b}
h1{font-size:1.35em}h2{font-size:1.1em;margin-top:1.6em}
table{border-collapse:collapse;width:100%}th,td{text-align:left;padding:.3em .5em;border-bottom:1px solid #ddd;
vertical-align:top}th{background:#f3f3f3}td.n{text-align:right;font-variant-numeric:tabular-nums}
.open{color:#a40000;font-weight:600}.sev-critical{color:#fff;background:#a40000;font-weight:600}
.sev-high{color:#8a3b00;font-weight:600}.sev-low{color:#555}.acknowledged{color:#8a5a00}.resolved{color:#2f6b2f}.expected{color:#555}
pre{background:#f6f6f6;padding:.6em;overflow-x:auto;white-space:pre-wrap;word-break:break-all}
footer{margin-top:2.5em;font-size:.85em;color:#555;border-top:1px solid #ddd;padding-top:.6em}
code{background:#f3f3f3;padding:0 .2em}td.title{overflow-wrap:anywhere}svg.chart{display:block}
"""


def e(value) -> str:
    """Escape anything for HTML text or a quoted attribute."""
    return html.escape(str(value), quote=True)


def when(ts: float | None) -> str:
    if ts is None:
        return "–"
    return datetime.fromtimestamp(ts, tz=timezone.utc).strftime("%Y-%m-%d %H:%M:%S UTC")


def ago(ts: float | None, now: float) -> str:
    """``ts`` relative to ``now``, in the largest whole unit: "just now", "5 min ago", "2 h ago"."""
    if ts is None:
        return "–"
    d = now - ts
    for unit, size in (("d", 86_400), ("h", 3600), ("min", 60), ("s", 1)):
        if abs(d) >= size:
            n = int(abs(d) // size)
            return f"{n} {unit} ago" if d > 0 else f"in {n} {unit}"
    return "just now"


def _rel(ts: float | None, now: float) -> str:
    """The relative time, with the absolute one as its tooltip."""
    return f'<span title="{e(when(ts))}">{e(ago(ts, now))}</span>'


def _page(title: str, body: str, *, refresh_s: int) -> str:
    return (f'<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
            f'<meta http-equiv="refresh" content="{int(refresh_s)}">'
            f'<meta name="viewport" content="width=device-width, initial-scale=1">'
            f"<title>{e(title)}</title><style>{_STYLE}</style></head>\n<body>\n{body}\n"
            f"<footer><p>{e(CAUTION)}</p><p>Refreshes every {int(refresh_s)} s. "
            f'JSON: <a href="/api/incidents">/api/incidents</a>.</p></footer>\n</body></html>\n')


# -- triage (tracewatch/triage.py): the on-call label and triage's suggestion --
def triage_text(inc: dict) -> str:
    """'label: NAME', 'triage suggests NAME (margin m)', 'triage: no suggestion (margin m)' or ''."""
    if inc.get("label"):
        return f"label: {inc['label']}"
    hint = inc.get("suggestion")
    if not isinstance(hint, dict):
        return ""
    if hint.get("label") is None:
        return f"triage: no suggestion (margin {hint.get('margin')})"
    verb = "suppressed as" if hint.get("action") == "suppress" else "suggests"
    return f"triage {verb} {hint['label']} (margin {hint.get('margin')})"


# -- alerts over time: inline SVG (markup of the page, not a fetched resource: the CSP allows it) --
BAR = "#d9480f"  # the bars' colour (the browser test looks for it in a screenshot)
MAX_BAR = 48  # pixels: a bar is never wider (a chart of one or two bars stays a chart)


def bars_svg(tl: dict, *, width: int = 720, height: int = 120, axis: bool = True) -> str:
    """A timeline (:func:`tracewatch.alerts.summary.timeline`) as an SVG bar chart: one bar per
    bucket, scaled to the peak; with ``axis``, the first and last bucket's times and the peak."""
    alerts, b = tl["alerts"], tl["bucket_s"]
    slot = max(1, width // max(1, len(alerts)))
    width = slot * max(1, len(alerts))
    plot = height - (18 if axis else 0)
    top = max(alerts, default=0) or 1
    bar = min(MAX_BAR, max(1, slot - max(1, slot // 5)))  # a gap of a fifth between bars
    rects = "".join(f'<rect x="{i * slot}" y="{plot - h}" width="{bar}" height="{h}"/>'
                    for i, n in enumerate(alerts) if n for h in [max(1, round(plot * n / top))])
    labels = ""
    if axis:
        last = tl["start"] + (len(alerts) - 1) * b
        labels = (f'<g font-size="11" fill="#555"><text x="0" y="{height - 4}">{e(when(tl["start"]))}</text>'
                  f'<text x="{width}" y="{height - 4}" text-anchor="end">{e(when(last))}</text>'
                  f'<text x="{width}" y="11" text-anchor="end">peak {int(top)} per {e(duration(b))}</text></g>')
    return (f'<svg class="chart" xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height}" '
            f'viewBox="0 0 {width} {height}" role="img" aria-label="alerts over time, {e(duration(b))} per bar">'
            f'<line x1="0" y1="{plot}" x2="{width}" y2="{plot}" stroke="#bbb"/>'
            f'<g fill="{BAR}" shape-rendering="crispEdges">{rects}</g>{labels}</svg>')


def _share(inc: dict) -> str:
    share = inc["reach"]["share"]
    return "" if share is None else f' <small>({share_text(share)} of {int(inc["rate"]["sessions"])})</small>'


def _href(**params) -> str:
    """A link to the list with these filters (escaped for an attribute)."""
    query = urlencode({k: v for k, v in params.items() if v is not None})
    return e("/?" + query if query else "/")


def _choice(label: str, href: str, chosen: bool, cls: str = "") -> str:
    attr = f' class="{e(cls)}"' if cls else ""
    link = f'<a{attr} href="{href}">{label}</a>'
    return f"<strong>{link}</strong>" if chosen else link


def list_page(incidents: list[dict], counts: dict[str, int], notify: dict[str, dict], *, refresh_s: int,
              status: str | None = None, source: str | None = None, sources: list[str] = (), offset: int = 0,
              limit: int = 200, now: float | None = None, overall: dict | None = None,
              charts: dict[int, dict] | None = None) -> str:
    """One page of incidents (of one ``status`` and one ``source``, if given), open ones first,
    then most recently active first; each status in the tally and each source links to its
    filter, and "newer"/"older" links page through. ``overall`` (alerts over time of every
    incident of the filter) and ``charts`` (per incident id, on the same time axis) are drawn as
    inline SVG."""
    tally = ", ".join(_choice(f"{counts.get(s, 0)} {e(s)}", _href(status=s, source=source), s == status, s)
                      for s in STATUSES) + " — " + _choice("all", _href(source=source), status is None)
    by_source = ""
    if sources or source:
        by_source = "<p>sources: " + " · ".join(
            _choice(e(name), _href(status=status, source=name), name == source)
            for name in sorted({*sources, *([source] if source else [])})) + " — " + _choice(
            "all sources", _href(status=status), source is None) + "</p>"
    now = time.time() if now is None else now
    paging = []
    if offset > 0:
        paging.append(f'<a href="{_href(status=status, source=source, offset=max(0, offset - limit), limit=limit)}">newer</a>')
    if len(incidents) == limit:
        paging.append(f'<a href="{_href(status=status, source=source, offset=offset + limit, limit=limit)}">older</a>')
    charts = charts or {}
    rows = []
    for inc in incidents:
        chart = bars_svg(charts[inc["id"]], width=144, height=24, axis=False) if inc["id"] in charts else ""
        rows.append(
            f'<tr><td><a href="/incidents/{int(inc["id"])}">#{int(inc["id"])}</a></td>'
            f'<td class="{e(inc["status"])}">{e(inc["status"])}</td>'
            f'<td class="sev-{e(inc["severity"])}">{e(inc["severity"])}</td>'
            f'<td class="n" title="{e(rate_text(inc))}">{int(inc["count"])}{_share(inc)}</td>'
            f'<td>{chart}</td><td>{_rel(inc["first_seen"], now)}</td><td>{_rel(inc["last_seen"], now)}</td>'
            f'<td>{e(", ".join(inc.get("sources") or []))}</td><td class="title">{e(inc["title"])}</td>'
            f'<td class="triage">{e(triage_text(inc))}</td></tr>')
    table = ("<table><thead><tr><th>id</th><th>status</th><th>severity</th><th>alerts (of sessions)</th>"
             "<th>over time</th><th>first seen</th><th>last seen</th><th>sources</th><th>what happened</th>"
             "<th>triage</th></tr></thead><tbody>\n" + "\n".join(rows) + "\n</tbody></table>"
             if rows else "<p>No incidents recorded.</p>")
    sinks = []
    for name, st in notify.items():
        state = f"{st.get('pending', 0)} pending"
        if st.get("last_error"):
            state += f", last error: {st['last_error']}"
        sinks.append(f"<li>{e(name)}: {e(state)}</li>")
    notes = f"<h2>Notifications</h2><ul>{''.join(sinks)}</ul>" if sinks else ""
    what = f"{e(status) if status else 'all'}" + (f" of {e(source)}" if source else "")
    shown = f"<p>showing {what}, open first, from #{offset + 1}" + (
        f" — {' · '.join(paging)}" if paging else "") + "</p>"
    drawn = (f'<h2>Alerts over time</h2><div class="overall">{bars_svg(overall)}</div>'
             f"<p><small>every incident shown by this filter ({what}), per {e(duration(overall['bucket_s']))}"
             "</small></p>" if overall is not None else "")
    body = f"<h1>tracewatch — incidents</h1><p>{tally}</p>\n{by_source}\n{shown}\n{drawn}\n{table}\n{notes}"
    return _page("tracewatch incidents", body, refresh_s=refresh_s)


def _shared_list(items: list[dict]) -> str:
    return "".join(f"<li>{e(i['text'])} <small>({round(100 * i['share'])}% of alerts)</small></li>" for i in items)


def detail_page(d: dict, *, refresh_s: int) -> str:
    """One incident: what went wrong, compared with what."""
    iid = int(d["id"])
    rep = d.get("representative") or {}
    facts = [("status", f'<span class="{e(d["status"])}">{e(d["status"])}</span>'
                        + (f" by {e(d['status_by'])}" if d.get("status_by") else "")),
             ("severity", f'<span class="sev-{e(d["severity"])}">{e(d["severity"])}</span>'),
             ("alerts", e(f"{rate_text(d)}, from {d['reach']['sources']} source(s)")),
             ("first seen", e(when(d["first_seen"]))),
             ("last seen", e(when(d["last_seen"]))), ("sources", e(", ".join(d.get("sources") or []))),
             ("representative session", f"{e(rep.get('source'))} / {e(rep.get('session_key'))} "
                                        f"(score {e(rep.get('score'))}, p = {e(rep.get('p_value'))})")]
    if d.get("note"):
        facts.append(("note", e(d["note"])))
    if triage_text(d):
        facts.append(("triage", e(triage_text(d))))
    parts = [f"<p><a href=\"/\">← all incidents</a></p><h1>#{iid}: {e(d['title'])}</h1>",
             "<table>" + "".join(f"<tr><th>{k}</th><td>{v}</td></tr>" for k, v in facts) + "</table>"]
    if d.get("timeline"):
        parts.append(f"<h2>Alerts over time</h2>{bars_svg(d['timeline'])}")
    if d.get("diff"):
        parts.append("<h2>Difference from the closest normal session</h2><ul class=\"diff\">"
                     + "".join(f"<li>{e(line)}</li>" for line in d["diff"]) + "</ul>")
    shared = d.get("shared") or {}
    labels = {"unseen": "Events never seen before", "unexpected": "Unusual steps or step sequences",
              "missing": "Expected steps missing", "reasons": "Reasons"}
    for key, label in labels.items():
        if shared.get(key):
            parts.append(f"<h2>{label} (shared by most alerts)</h2><ul>{_shared_list(shared[key])}</ul>")
    if d.get("closest_normal"):
        parts.append("<h2>The closest normal session</h2><ol>"
                     + "".join(f"<li>{e(step)}</li>" for step in d["closest_normal"]) + "</ol>")
    if d.get("samples"):
        parts.append("<h2>Sample lines (redacted)</h2><pre class=\"samples\">"
                     + "\n".join(e(s) for s in d["samples"]) + "</pre>")
    parts.append(f"<h2>Act on it</h2><p>With the bearer token: <code>tracewatch incidents ack {iid}</code>, "
                 f"<code>resolve {iid}</code> or <code>expected {iid}</code> "
                 f"(or <code>POST /api/incidents/{iid}/ack</code>). To teach triage: "
                 f"<code>tracewatch label {iid} --expected</code> or <code>--known NAME</code>.</p>")
    return _page(f"#{iid} {d['title']} — tracewatch", "\n".join(parts), refresh_s=refresh_s)


def message_page(title: str, message: str, *, refresh_s: int = 30) -> str:
    return _page(title, f"<p><a href=\"/\">← all incidents</a></p><h1>{e(title)}</h1><p>{e(message)}</p>",
                 refresh_s=refresh_s)
