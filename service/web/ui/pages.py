"""The web view's routes: sign in and out, the network, the alerts (with their live updates and
acknowledgement) and one detector's day. Each route reads through ``store`` / ``pipeline`` and
returns server-built HTML; nothing is loaded from another host."""

from __future__ import annotations

import secrets
from datetime import date, datetime, timedelta
from typing import Annotated, Any
from urllib.parse import parse_qs, quote
from zoneinfo import ZoneInfo

from fastapi import APIRouter, Depends, Query, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import HTMLResponse, JSONResponse, RedirectResponse, Response

from service.domain import CAUSES, KINDS, ROAD_CLASSES, prose
from service.errors import Forbidden, NotFound, ValidationFailed
from service.pipeline import baseline_day
from service.store import alerts as alert_store
from service.store import detectors as registry
from service.store import overview
from service.store.scoring import clock_now, period_clock_now
from service.web.ui import charts
from service.web.ui.assets import ASSETS, CACHE_FOREVER
from service.web.ui.render import (
    PAGE_HEADERS,
    duration,
    h,
    local_time,
    options,
    page,
    parse_utc,
    query,
)
from service.web.ui.session import (
    Session,
    clear_cookie,
    is_https,
    new_cookie_value,
    read_session,
    require_session,
    secret_of,
    set_cookie,
)

router = APIRouter(prefix="/ui", include_in_schema=False)
SessionDep = Annotated[Session, Depends(require_session)]
ALERT_ROWS = 200  # alerts listed on the page; the rest are counted and reached by filters
POLL_PAGE = 500  # changes read per poll of the seq feed
NOTE_MAX = 2000  # characters, as the API's acknowledgement note
FORM_MAX_BYTES = 16 * 1024
SORTS = {"detector": lambda r: r.detector_id, "label": lambda r: (r.label or "").lower(),
         "group": lambda r: r.group or "", "road": lambda r: r.road_class,
         "state": lambda r: overview.STATES.index(r.state),
         "last": lambda r: r.last_start_s or 0, "alerts": lambda r: r.open_alerts,
         "complete": lambda r: r.completeness_24h}


class BadInput(Exception):
    """A page's query or form value that is not accepted: a 400 page saying what is."""


def html(body: str, status: int = 200) -> HTMLResponse:
    return HTMLResponse(body, status_code=status, headers=PAGE_HEADERS)


def shown(session: Session, body: str, status: int = 200) -> Response:
    return session.keep_alive(html(body, status))


def framed(session: Session, *, title: str, body: str, active: str = "",
           status: int = 200) -> Response:
    return shown(session, page(title=title, body=body, active=active,
                               who=f"{session.principal.name} ({session.principal.role})",
                               csrf=session.csrf), status)


def no_such_detector(session: Session, detector_id: str) -> Response:
    """The 404 page of a detector page whose detector is not registered."""
    return framed(session, title="No such detector", status=404,
                  body=f'<p>There is no detector {h(detector_id)}.</p>'
                       '<p><a href="/ui/network">Back to the network</a></p>')


def one_of(name: str, value: str | None, allowed: tuple[str, ...]) -> str | None:
    if value in (None, ""):
        return None
    if value not in allowed:
        raise BadInput(f"{name} {value[:40]!r} is not known; {name} is one of "
                       f"{', '.join(allowed)} (or empty for any)")
    return value


def safe_next(target: str | None) -> str:
    """Where to go after signing in: a path of the view, never another host."""
    if target and target.startswith("/ui/") and not target.startswith("//") and "\\" not in target:
        return target
    return "/ui/network"


async def form_of(request: Request) -> dict[str, str]:
    """A urlencoded form's fields (the first value of each)."""
    kind = request.headers.get("content-type", "").split(";")[0].strip().lower()
    if kind != "application/x-www-form-urlencoded":
        raise BadInput("forms are sent as application/x-www-form-urlencoded")
    body = await request.body()
    if len(body) > FORM_MAX_BYTES:
        raise BadInput(f"the form is over {FORM_MAX_BYTES:,} bytes")
    try:
        fields = parse_qs(body.decode("utf-8"), keep_blank_values=True, strict_parsing=False)
    except UnicodeDecodeError:
        raise BadInput("the form is not UTF-8 text") from None
    return {k: v[0] for k, v in fields.items()}


# ---------------------------------------------------------------------------- sign in / out


def login_form(*, next_path: str, message: str = "") -> str:
    error = (f'<p class="error" role="alert" id="login-error">{h(message)}</p>'
             if message else "")
    described = ' aria-describedby="login-error"' if message else ""
    body = (f'{error}<form method="post" action="/ui/login" class="login">'
            f'<input type="hidden" name="next" value="{h(next_path)}">'
            '<label for="key">API key</label>'
            '<input id="key" name="key" type="password" autocomplete="off" required '
            f'spellcheck="false" maxlength="200"{described}>'
            '<button type="submit">Sign in</button></form>'
            '<p class="muted">Keys are made with <code>tallyward keys create</code>. '
            'The key is sent once; the browser then holds a session that ends after a period '
            'without use, when you sign out, or when the key is revoked.</p>')
    return page(title="Sign in", body=body)


@router.get("/login")
def login_page(request: Request, next: str | None = None) -> Response:  # noqa: A002
    if read_session(request) is not None:
        return RedirectResponse(safe_next(next), status_code=303)
    return html(login_form(next_path=safe_next(next)))


@router.post("/login")
async def login(request: Request) -> Response:
    fields = await form_of(request)
    key = fields.get("key", "").strip()
    target = safe_next(fields.get("next"))
    found = await run_in_threadpool(overview.key_for_sign_in, request.app.state.engine,
                                    key) if 0 < len(key) <= 200 else None
    if found is None:
        return html(login_form(next_path=target, message="That key is unknown or revoked."), 401)
    key_id, principal = found
    if not principal.may("read"):
        return html(login_form(next_path=target, message=(
            f"Key {principal.name!r} has role {principal.role!r}, which may not read; the view "
            "needs a key with role read, operate or admin.")), 403)
    response = RedirectResponse(target, status_code=303)
    set_cookie(response, new_cookie_value(secret_of(request), key_id),
               idle_s=request.app.state.settings.ui_session_idle_s, secure=is_https(request))
    return response


@router.post("/logout")
async def logout(request: Request) -> Response:
    fields = await form_of(request)
    session = await run_in_threadpool(read_session, request)
    if session is not None:
        session.check_csrf(fields.get("csrf"))
    response = RedirectResponse("/ui/login", status_code=303)
    clear_cookie(response, secure=is_https(request))
    return response


@router.get("/")
def home() -> Response:
    return RedirectResponse("/ui/network", status_code=303)


@router.get("/static/{name}")
def static(name: str) -> Response:
    asset = ASSETS.get(name)
    if asset is None:
        return Response("not found", status_code=404, media_type="text/plain")
    return Response(asset.body, media_type=asset.media_type,
                    headers={"Cache-Control": CACHE_FOREVER, "X-Content-Type-Options": "nosniff"})


# ---------------------------------------------------------------------------- network


def _age(now: float, start_s: int | None, interval_s: int) -> str:
    if start_s is None:
        return "never"
    return f"{duration(now - (start_s + interval_s))} ago"


@router.get("/network")
def network_page(
    request: Request, session: SessionDep,
    group: Annotated[str | None, Query(max_length=64)] = None,
    state: Annotated[str | None, Query(max_length=20)] = None,
    road_class: Annotated[str | None, Query(max_length=20)] = None,
    sort: Annotated[str, Query(max_length=20)] = "state",
    dir: Annotated[str, Query(max_length=4)] = "desc",  # noqa: A002
) -> Response:
    settings, engine = request.app.state.settings, request.app.state.engine
    state = one_of("state", state, overview.STATES)
    road_class = one_of("road_class", road_class, ROAD_CLASSES)
    sort = one_of("sort", sort, tuple(SORTS)) or "state"
    descending = one_of("dir", dir, ("asc", "desc")) != "asc"
    now, rows = overview.network(engine, settings)
    groups = sorted({r.group for r in rows if r.group})
    if group not in (None, "") and group not in groups:
        raise BadInput(f"group {group[:40]!r} is not a group of this network")
    shown_rows = [r for r in rows if (not group or r.group == group)
                  and (not state or r.state == state)
                  and (not road_class or r.road_class == road_class)]
    shown_rows.sort(key=lambda r: r.detector_id)
    shown_rows.sort(key=SORTS[sort], reverse=descending)
    tally = {s: sum(1 for r in rows if r.state == s) for s in overview.STATES}
    the_map, markers = charts.network_map(shown_rows)
    summary = "".join(f'<li>{charts.legend_icon(s)} <span class="st-name">{s}</span> '
                      f'<strong data-tally="{s}">{tally[s]}</strong></li>'
                      for s in overview.STATES)
    filters = (
        '<form method="get" action="/ui/network" class="filters" aria-label="Filter detectors">'
        f'<label>Group <select name="group">{options(groups, group)}</select></label>'
        f'<label>State <select name="state">{options(overview.STATES, state)}</select></label>'
        f'<label>Road class <select name="road_class">{options(ROAD_CLASSES, road_class)}'
        '</select></label>'
        f'<input type="hidden" name="sort" value="{h(sort)}"><input type="hidden" name="dir" '
        f'value="{"desc" if descending else "asc"}"><button type="submit">Apply</button>'
        '<a href="/ui/network">Clear</a></form>')
    heads = (("detector", "Detector"), ("label", "Label"), ("group", "Group"),
             ("road", "Road class"), ("state", "State"), ("last", "Last report"),
             ("alerts", "Open alerts"), ("complete", "Complete 24 h"))
    th = []
    for key, label in heads:
        flip = "asc" if (key == sort and descending) else "desc"
        aria = (f' aria-sort="{"descending" if descending else "ascending"}"'
                if key == sort else "")
        arrow = (" ▼" if descending else " ▲") if key == sort else ""
        href = "/ui/network" + query(group=group, state=state, road_class=road_class,
                                     sort=key, dir=flip)
        th.append(f'<th scope="col"{aria}><a href="{h(href)}">{label}{arrow}</a></th>')
    body_rows = []
    for r in shown_rows:
        body_rows.append(
            f'<tr data-detector="{h(r.detector_id)}"><td class="nw"><a href="/ui/detectors/{h(r.detector_id)}">'
            f'{h(r.detector_id)}</a></td><td>{h(r.label or "")}</td><td>{h(r.group or "")}</td>'
            f'<td>{h(r.road_class)}</td><td class="state nw">{charts.legend_icon(r.state)} '
            f'{r.state}</td><td>{_age(now, r.last_start_s, r.interval_s)}</td>'
            f'<td class="num">{r.open_alerts or ""}</td>'
            f'<td class="num">{r.completeness_24h:.0%}</td></tr>')
    body = (
        f'<ul class="tally" aria-label="Detectors by state">{summary}</ul>{filters}'
        f'<p class="muted">{len(shown_rows)} of {len(rows)} detectors shown; {markers} on the '
        f'map (those with a location). Clock: {h(settings.clock)}, '
        f'{h(datetime.fromtimestamp(now).astimezone().strftime("%Y-%m-%d %H:%M %Z"))}. '
        'Silent: no count for more than an interval plus the grace time, or a no_reports alert '
        'open. Learning: no baseline fitted yet.</p>'
        f'<div class="network"><section aria-label="Map">{the_map}</section>'
        '<section aria-label="Detectors" class="table-wrap"><table class="grid" id="detectors">'
        f'<caption>Detectors</caption><thead><tr>{"".join(th)}</tr></thead>'
        f'<tbody>{"".join(body_rows)}</tbody></table></section></div>')
    return framed(session, title="Network", body=body, active="network")


# ---------------------------------------------------------------------------- alerts


def alert_row(a: dict[str, Any], zone: str | None) -> str:
    """One alert as a table row (the same HTML on the page and in the live updates)."""
    start_s = parse_utc(a["start"])
    end_s = parse_utc(a["end"])
    zone = zone or "UTC"
    subject = (f'<a href="/ui/detectors/{h(a["detector_id"])}">{h(a["detector_id"])}</a>'
               if a["detector_id"] else f'group {h(a["group"])}')
    observed = "" if a["observed"] is None else f'{a["observed"]:g}'
    expected = "" if a["expected"] is None else f'{a["expected"]:g}'
    ack = a.get("acknowledged")
    ack_text = (f'{h(ack["by"])}: {h(ack["note"] or "")}' if ack else "")
    status = a["status"] + (" (withdrawn)" if a.get("withdrawn") else "")
    # Through the end of its last interval (for an open alert: so far, on the data's clock).
    lasting = duration(end_s - start_s) + (" so far" if a["status"] == "open" else "")
    return (f'<tr id="alert-{a["id"]}" data-seq="{a["seq"]}" data-status="{h(a["status"])}">'
            f'<td><a href="/ui/alerts/{a["id"]}" aria-label="Alert {a["id"]}">{a["id"]}</a></td>'
            f'<td>{subject}</td><td>{h(a["kind"])}</td><td>{h(a["cause"])}</td>'
            f'<td>{h(status)}</td><td class="summary">{h(a["summary"])}</td>'
            f'<td class="nw">{h(local_time(start_s, zone))}</td><td class="nw">{lasting}</td>'
            f'<td class="num">{observed} / {expected}</td>'
            f'<td class="num">{"" if a["score"] is None else a["score"]}</td>'
            f'<td class="ack">{ack_text}</td></tr>')


def _alert_filters(status: str | None, kind: str | None, cause: str | None,
                   group: str | None, groups: list[str]) -> tuple[str, str | None, str | None,
                                                               str | None]:
    status = one_of("status", status, ("open", "closed", "any")) or "any"
    kind = one_of("kind", kind, KINDS)
    cause = one_of("cause", cause, CAUSES)
    if group not in (None, "") and group not in groups:
        raise BadInput(f"group {group[:40]!r} is not a group of this network")
    return status, kind, cause, group or None


def _matches(a: dict[str, Any], status: str, kind: str | None, cause: str | None,
             group: str | None) -> bool:
    return ((status == "any" or a["status"] == status) and (kind is None or a["kind"] == kind)
            and (cause is None or a["cause"] == cause) and (group is None or a["group"] == group))


def _zones(engine: Any, alerts: list[dict[str, Any]], group_zones: dict[str, str]
           ) -> dict[int, str | None]:
    det_zone = overview.alert_detector_zones(engine, {a["detector_id"] for a in alerts
                                                      if a["detector_id"]})
    return {a["id"]: det_zone.get(a["detector_id"]) if a["detector_id"]
            else group_zones.get(a["group"]) for a in alerts}


@router.get("/alerts")
def alerts_page(
    request: Request, session: SessionDep,
    status: Annotated[str | None, Query(max_length=10)] = "open",
    kind: Annotated[str | None, Query(max_length=20)] = None,
    cause: Annotated[str | None, Query(max_length=20)] = None,
    group: Annotated[str | None, Query(max_length=64)] = None,
) -> Response:
    engine = request.app.state.engine
    groups, group_zones = overview.groups_and_zones(engine)
    status, kind, cause, group = _alert_filters(status, kind, cause, group, groups)
    high, alerts, total = overview.alert_list(engine, status=status, kind=kind, cause=cause,
                                              group=group, limit=ALERT_ROWS)
    zones = _zones(engine, alerts, group_zones)
    rows = "".join(alert_row(a, zones[a["id"]]) for a in alerts)
    poll = "/ui/alerts/changes" + query(status=status, kind=kind, cause=cause, group=group)
    filters = (
        '<form method="get" action="/ui/alerts" class="filters" aria-label="Filter alerts">'
        f'<label>Status <select name="status">'
        f'{options(("open", "closed"), None if status == "any" else status)}'
        '</select></label>'
        f'<label>Kind <select name="kind">{options(KINDS, kind)}</select></label>'
        f'<label>Cause <select name="cause">{options(CAUSES, cause)}</select></label>'
        f'<label>Group <select name="group">{options(groups, group)}</select></label>'
        '<button type="submit">Apply</button><a href="/ui/alerts">Clear</a></form>')
    body = (
        f'{filters}<p class="muted"><span id="alert-count">{total}</span> alerts match; the '
        f'{min(total, ALERT_ROWS)} latest to start are listed. Updates arrive every few seconds '
        'without reloading. Start times are the detector\'s local time.</p>'
        '<p id="live" class="live" role="status" aria-live="polite"></p>'
        '<div class="table-wrap"><table class="grid" id="alerts" '
        f'data-poll="{h(poll)}" data-after="{high}" data-limit="{ALERT_ROWS}">'
        '<caption>Alerts</caption><thead><tr><th scope="col">Alert</th>'
        '<th scope="col">Detector</th><th scope="col">Kind</th><th scope="col">Cause</th>'
        '<th scope="col">Status</th><th scope="col">Summary</th><th scope="col">Start</th>'
        '<th scope="col">Duration</th><th scope="col">Observed / expected</th>'
        '<th scope="col">Score</th><th scope="col">Acknowledged</th></tr></thead>'
        f'<tbody>{rows}</tbody></table></div>')
    return framed(session, title="Alerts", body=body, active="alerts")


@router.get("/alerts/changes")
def alert_changes(
    request: Request,
    after: Annotated[int, Query(ge=0, le=2**63 - 1)] = 0,
    status: Annotated[str | None, Query(max_length=10)] = "any",
    kind: Annotated[str | None, Query(max_length=20)] = None,
    cause: Annotated[str | None, Query(max_length=20)] = None,
    group: Annotated[str | None, Query(max_length=64)] = None,
) -> Response:
    """The page's live updates: every alert change after ``after`` (the seq feed of
    GET /v1/alerts), each as its new row, or as a removal when it no longer matches."""
    session = read_session(request)
    if session is None:
        return JSONResponse({"error": "unauthorized", "message": "sign in again"}, 401)
    engine = request.app.state.engine
    groups, group_zones = overview.groups_and_zones(engine)
    status, kind, cause, group = _alert_filters(status, kind, cause, group, groups)
    changed: dict[int, dict[str, Any]] = {}
    cursor = after
    for _ in range(20):  # at most 10,000 changes a poll; the next poll continues from there
        polled = alert_store.poll(engine, after=cursor, status="any", detector_id=None,
                                  group=None, kind=None, limit=POLL_PAGE, query="",
                                  if_none_match=None)
        assert polled.page is not None
        for a in polled.page["data"]:
            changed[a["id"]] = a
        cursor = polled.page["next_after"]
        if len(polled.page["data"]) < POLL_PAGE:
            break
    items = list(changed.values())
    zones = _zones(engine, items, group_zones)
    out = [{"id": a["id"], "seq": a["seq"], "start": a["start"],
            "row": alert_row(a, zones[a["id"]])
            if _matches(a, status, kind, cause, group) else None} for a in items]
    return JSONResponse({"next_after": cursor, "changes": out},
                        headers={"Cache-Control": "no-store"})


def _history(a: dict[str, Any]) -> list[dict[str, Any]]:
    """The alert's acknowledgement notes: the API's history when it has one, else the current
    acknowledgement."""
    history = a.get("history")
    if isinstance(history, list):
        return [e for e in history if isinstance(e, dict)]
    return [a["acknowledged"]] if a.get("acknowledged") else []


def alert_detail(session: Session, a: dict[str, Any], zone: str, *, message: str = "",
                 status: int = 200) -> Response:
    start_s, end_s = parse_utc(a["start"]), parse_utc(a["end"])
    facts = [("Detector", a["detector_id"] or f'group {a["group"]}'), ("Group", a["group"]),
             ("Kind", a["kind"]), ("Likely cause", a["cause"]), ("Status", a["status"]),
             ("Start (local)", local_time(start_s, zone)), ("End (local)", local_time(end_s, zone)),
             ("Intervals", a["intervals"]), ("Observed", a["observed"]),
             ("Expected", a["expected"]), ("Score (−log10 p)", a["score"]),
             ("Members", ", ".join(a["detectors"] or []) or None)]
    dl = "".join(f"<dt>{h(k)}</dt><dd>{h(v)}</dd>" for k, v in facts if v is not None)
    entries = _history(a)
    if entries:
        items = "".join(
            f'<li><strong>{h(e.get("by"))}</strong> at '
            f'{h(local_time(parse_utc(e["at"]), zone) if e.get("at") else "")}: '
            f'<span class="note">{h(e.get("note") or "(no note)")}</span></li>' for e in entries)
        history = f'<ol class="history" id="note-history">{items}</ol>'
    else:
        history = '<p id="note-history" class="muted">Not acknowledged yet.</p>'
    error = f'<p class="error" role="alert">{h(message)}</p>' if message else ""
    if session.may("operate"):
        # Operator actions on an alert; more (e.g. a detector's service state) join this form's
        # section with their own forms, each carrying the session's CSRF token.
        action = (
            f'<section aria-labelledby="ack-h"><h2 id="ack-h">Acknowledge</h2>{error}'
            f'<form method="post" action="/ui/alerts/{a["id"]}/acknowledge" class="ack-form">'
            f'<input type="hidden" name="csrf" value="{h(session.csrf)}">'
            '<label for="note">Note (what was done, who was sent)</label>'
            f'<textarea id="note" name="note" rows="3" maxlength="{NOTE_MAX}"></textarea>'
            '<button type="submit">Acknowledge</button></form>'
            '<p class="muted">Acknowledging records your note; the alert still closes on its '
            'own when the evidence ends.</p></section>')
    else:
        action = ('<p class="muted">Your key\'s role may view alerts; acknowledging needs a '
                  'key with role operate.</p>')
    body = (f'<p class="summary-lead">{h(a["summary"])}</p><dl class="facts">{dl}</dl>'
            f'<section aria-labelledby="hist-h"><h2 id="hist-h">Notes</h2>{history}</section>'
            f'{action}<p><a href="/ui/alerts">Back to the alerts</a></p>')
    return framed(session, title=f'Alert {a["id"]}', body=body, active="alerts", status=status)


def _alert_zone(engine: Any, a: dict[str, Any]) -> str:
    if a["detector_id"]:
        return overview.alert_detector_zones(engine, {a["detector_id"]}).get(a["detector_id"],
                                                                              "UTC")
    return overview.groups_and_zones(engine)[1].get(a["group"], "UTC")


def _get_alert(engine: Any, alert_id: int) -> dict[str, Any] | None:
    if not 1 <= alert_id <= 2**31 - 1:
        return None
    try:
        return alert_store.get_alert(engine, alert_id)
    except NotFound:
        return None


@router.get("/alerts/{alert_id}")
def alert_page(alert_id: int, request: Request, session: SessionDep) -> Response:
    engine = request.app.state.engine
    a = _get_alert(engine, alert_id)
    if a is None:
        return framed(session, title="No such alert", status=404,
                      body=f'<p>There is no alert {alert_id}.</p><p><a href="/ui/alerts">'
                           'Back to the alerts</a></p>')
    return alert_detail(session, a, _alert_zone(engine, a))


@router.post("/alerts/{alert_id}/acknowledge")
async def acknowledge(alert_id: int, request: Request) -> Response:
    fields = await form_of(request)
    session = await run_in_threadpool(require_session, request)
    session.check_csrf(fields.get("csrf"))
    if not session.may("operate"):
        return framed(session, title="Not allowed", status=403, body=(
            f'<p>Key {h(session.principal.name)} has role {h(session.principal.role)}, which may '
            'not acknowledge alerts; that needs a key with role operate or admin.</p>'))
    engine = request.app.state.engine
    a = await run_in_threadpool(_get_alert, engine, alert_id)
    if a is None:
        return framed(session, title="No such alert", status=404,
                      body=f"<p>There is no alert {alert_id}.</p>")
    note = fields.get("note", "").strip() or None
    problem = None
    if note is not None and len(note) > NOTE_MAX:
        problem = f"the note is {len(note):,} characters; notes hold at most {NOTE_MAX:,}"
    else:
        try:
            prose(note)
        except ValueError as exc:
            problem = f"the note {exc}"
    if problem:
        zone = await run_in_threadpool(_alert_zone, engine, a)
        return alert_detail(session, a, zone, message=problem, status=400)
    await run_in_threadpool(lambda: alert_store.acknowledge(
        engine, alert_id, by=session.principal.name, note=note))
    return session.keep_alive(RedirectResponse(f"/ui/alerts/{alert_id}", status_code=303))


# ---------------------------------------------------------------------------- one detector


def _local_midnight(day: date, zone: ZoneInfo) -> int:
    return int(datetime(day.year, day.month, day.day, tzinfo=zone).timestamp())


def _hourly_bars(hourly: list[float], peak_start_s: int) -> str:
    top = max(hourly) or 1.0
    peak_hour = peak_start_s // 3600
    bars = "".join(
        f'<rect class="{"bar peak" if peak_hour <= i < peak_hour + 1 else "bar"}" x="{i * 5}" '
        f'y="{30 - v / top * 28:.1f}" width="4" height="{v / top * 28:.1f}"/>'
        for i, v in enumerate(hourly))
    return (f'<svg class="bars" viewBox="0 0 120 30" width="120" height="30" aria-hidden="true" '
            f'focusable="false">{bars}</svg>')


@router.get("/detectors/{detector_id}")
def detector_page(
    detector_id: str, request: Request, session: SessionDep,
    date_: Annotated[str | None, Query(alias="date", max_length=10)] = None,
) -> Response:
    return detector_view(request, session, detector_id, date_)


def detector_view(request: Request, session: Session, detector_id: str, date_: str | None, *,
                  message: str = "", entered: dict[str, str] | None = None,
                  status: int = 200) -> Response:
    """The detector's page; ``message`` (with the form values ``entered``) when a service-state
    change was not accepted."""
    settings, engine = request.app.state.settings, request.app.state.engine
    try:
        det = registry.get_detector(engine, detector_id)
    except NotFound:
        return no_such_detector(session, detector_id)
    zone = ZoneInfo(det["timezone"])
    if date_:
        try:
            day = date.fromisoformat(date_) if len(date_) == 10 else None
        except ValueError:
            day = None
        if day is None or not date(1990, 1, 1) <= day <= date(2100, 12, 31):
            raise BadInput(f"date {date_!r} is not a calendar date YYYY-MM-DD in 1990..2100")
    else:
        day = datetime.fromtimestamp(overview.scoring_clock(engine, settings), zone).date()
    lo = _local_midnight(day, zone)
    hi = _local_midnight(day + timedelta(days=1), zone)
    interval_s = det["interval_s"]
    try:
        baseline = baseline_day.baseline_day(engine, detector_id, day=day, day_type=None,
                                             level=0.95)
    except NotFound:
        baseline = None
    observed = dict(overview.day_counts(engine, detector_id, lo_s=lo, hi_s=hi))
    if baseline is not None:
        grid = [(int(datetime.fromisoformat(p["start"]).timestamp()), p) for p in baseline["data"]]
    else:
        grid = [(t, None) for t in range(lo, hi, interval_s)]
    points = [charts.DayPoint(t, local_time(t, det["timezone"], with_date=False),
                              p["expected"] if p else None, p["low"] if p else None,
                              p["high"] if p else None, observed.get(t)) for t, p in grid]
    day_alerts = overview.detector_alerts(engine, detector_id, lo_s=lo, hi_s=hi)
    hours = [(t, local_time(t, det["timezone"], with_date=False))
             for t in range(lo, hi, 3600)
             if datetime.fromtimestamp(t, zone).hour % 3 == 0]
    chart = charts.day_chart(points, lo_s=lo, hi_s=hi, interval_s=interval_s, alerts=day_alerts,
                             hour_labels=hours)
    health = alert_store.detector_health(engine, detector_id,
                                         clock=lambda conn: clock_now(conn, settings))
    try:
        prof = baseline_day.profile(engine, detector_id)
    except NotFound:
        prof = None
    recent = overview.detector_alerts(engine, detector_id, limit=10)

    total_obs = sum(observed.values())
    expected_text = (f'expected {baseline["expected_total"]:,.0f} '
                     f'({h(baseline["day_type"])} baseline {baseline["model"]["baseline_id"]})'
                     if baseline else "no baseline fitted yet: observed counts only")
    prev_day, next_day = day - timedelta(days=1), day + timedelta(days=1)
    day_form = (
        f'<form method="get" action="/ui/detectors/{h(detector_id)}" class="filters" '
        'aria-label="Choose a day">'
        f'<a href="?date={prev_day.isoformat()}">← {prev_day.isoformat()}</a>'
        f'<label>Local day <input type="date" name="date" value="{day.isoformat()}" '
        'required></label><button type="submit">Show</button>'
        f'<a href="?date={next_day.isoformat()}">{next_day.isoformat()} →</a></form>')
    facts = [("Label", det["label"]), ("Group", det["group"]), ("Road class", det["road_class"]),
             ("Lanes", det["lanes"]), ("Interval", f"{interval_s // 60} min" if interval_s >= 60
                                       else f"{interval_s} s"), ("Time zone", det["timezone"])]
    dl = "".join(f"<dt>{h(k)}</dt><dd>{h(v)}</dd>" for k, v in facts if v is not None)
    hrows = "".join(
        f'<tr><th scope="row">{label}</th><td class="num">{w["completeness"]:.1%}</td>'
        f'<td class="num">{w["reported"]:,} of {w["intervals"]:,}</td>'
        f'<td class="num">{w["flagged_share"]:.1%}</td></tr>'
        for label, w in (("Last 24 h", health["last_24h"]), ("Last 7 days", health["last_7d"])))
    health_html = (
        '<table class="grid compact"><caption>Health</caption><thead><tr><th scope="col">Window'
        '</th><th scope="col">Complete</th><th scope="col">Intervals stored</th>'
        f'<th scope="col">Flagged</th></tr></thead><tbody>{hrows}</tbody></table>')
    if prof is not None:
        prow = []
        for name, fig in prof["day_types"].items():
            peak = fig["busiest_hour"]
            prow.append(
                f'<tr><th scope="row">{h(name)}</th><td>{_hourly_bars(fig["hourly_volume"], peak["start_s"])}</td>'
                f'<td class="num">{fig["daily_volume"]:,.0f}</td><td>{h(peak["start"])}</td>'
                f'<td class="num">{peak["volume"]:,.0f}</td>'
                f'<td class="num">{peak["share_of_expected_day"]:.1%}</td>'
                f'<td>{h(fig["fitted_from"])}</td></tr>')
        prof_html = (
            '<table class="grid compact"><caption>Baseline profiles (expected, local time)'
            '</caption><thead><tr><th scope="col">Day type</th><th scope="col">Hourly shape</th>'
            '<th scope="col">Daily volume</th><th scope="col">Busiest hour</th>'
            '<th scope="col">Busiest-hour volume</th><th scope="col">Share of expected day</th>'
            '<th scope="col">Fitted from</th></tr></thead>'
            f'<tbody>{"".join(prow)}</tbody></table>'
            '<p class="muted">Peak-hour factors, AADT and K30 come from counted data: '
            f'<a href="/ui/detectors/{h(detector_id)}/figures">planners\' figures of the '
            'year</a>.</p>')
    else:
        prof_html = '<p class="muted">No baseline fitted yet.</p>'
    recent_rows = "".join(
        f'<tr><td><a href="/ui/alerts/{a["id"]}">{a["id"]}</a></td><td>{h(a["kind"])}</td>'
        f'<td>{h(a["cause"])}</td><td>{h(a["status"])}'
        f'{" (suppressed: raised out of service)" if a.get("suppressed") else ""}</td>'
        f'<td>{h(local_time(a["start_s"], det["timezone"]))}</td>'
        f'<td>{duration(a["end_s"] - a["start_s"])}</td><td class="summary">{h(a["summary"])}</td>'
        '</tr>' for a in recent)
    recent_html = (
        '<table class="grid compact"><caption>Recent alerts</caption><thead><tr>'
        '<th scope="col">Alert</th><th scope="col">Kind</th><th scope="col">Cause</th>'
        '<th scope="col">Status</th><th scope="col">Start</th><th scope="col">Duration</th>'
        f'<th scope="col">Summary</th></tr></thead><tbody>{recent_rows}</tbody></table>'
        if recent else '<p class="muted">No alerts for this detector.</p>')
    open_alerts = [a for a in recent if a["status"] == "open"]
    # Operator actions for this detector: acknowledging its open alerts, and its service state.
    if open_alerts and session.may("operate"):
        actions = "".join(f'<li><a href="/ui/alerts/{a["id"]}">Review and acknowledge alert '
                          f'{a["id"]} ({h(a["kind"])})</a></li>' for a in open_alerts)
        actions_html = f'<ul class="actions">{actions}</ul>'
    elif open_alerts:
        actions_html = '<p class="muted">Open alerts can be acknowledged with an operate key.</p>'
    else:
        actions_html = '<p class="muted">Nothing open.</p>'
    body = (
        f'<dl class="facts">{dl}</dl>{day_form}'
        f'<section aria-labelledby="day-h"><h2 id="day-h">{day.isoformat()} ({h(det["timezone"])})'
        f'</h2><p>Observed {total_obs:,} vehicles in {len(observed):,} of {len(points):,} '
        f'intervals; {expected_text}.</p>'
        '<p class="legend"><span class="key key-band"></span> 95 % band '
        '<span class="key key-exp"></span> expected <span class="key key-obs"></span> observed '
        '(squares: outside the band) <span class="key key-shade"></span> alert</p>'
        f'{chart}<p id="readout" class="readout" aria-live="polite">Point at or tab to a count '
        'to read its values.</p></section>'
        f'<section aria-labelledby="act-h"><h2 id="act-h">Actions</h2>{actions_html}'
        f'{service_section(session, det, message=message, entered=entered or {})}</section>'
        f'<div class="cols"><section aria-label="Health">{health_html}</section>'
        f'<section aria-label="Profiles">{prof_html}</section></div>'
        f'<section aria-label="Recent alerts">{recent_html}</section>')
    return framed(session, title=f"Detector {detector_id}", body=body, active="network",
                  status=status)


# ---------------------------------------------------------------------------- service state

SERVICE_REASON_MAX = 500  # characters, as the API's service-state reason
UNTIL_MAX = 64  # characters, as the API's until


def service_section(session: Session, det: dict[str, Any], *, message: str,
                    entered: dict[str, str]) -> str:
    """The detector's service state (state, reason, by whom, since and until when, in its local
    time) and, for an operate key, the form that changes it."""
    svc, zone, state = det["service"], det["timezone"], det["service"]["state"]

    def when(text: str | None) -> str | None:
        return local_time(parse_utc(text), zone) if text else None

    until = when(svc["until"]) or ("until changed" if state == "out_of_service" else None)
    facts = [("State", state.replace("_", " ")), ("Reason", svc["reason"]), ("Set by", svc["by"]),
             ("Since", when(svc["since"])), ("Until", until)]
    dl = "".join(f"<dt>{h(k)}</dt><dd>{h(v)}</dd>" for k, v in facts if v is not None)
    error = f'<p class="error" role="alert" id="service-error">{h(message)}</p>' if message else ""
    described = ' aria-describedby="service-error"' if message else ""
    start = (f'<form method="post" action="/ui/detectors/{h(det["detector_id"])}/service" '
             f'class="service-form"><input type="hidden" name="csrf" value="{h(session.csrf)}">')
    if not session.may("operate"):
        control = ('<p class="muted">Your key\'s role may view the service state; changing it '
                   'needs a key with role operate.</p>')
    elif state == "retired":
        control = ('<p class="muted">A retired detector is returned to service by an admin key '
                   'through the API (PATCH /v1/detectors/{id}).</p>')
    elif state == "out_of_service":
        control = (f'{start}<input type="hidden" name="state" value="in_service">'
                   '<button type="submit">Return to service</button></form>')
    else:
        control = (
            f'{start}<input type="hidden" name="state" value="out_of_service">'
            '<label for="service-reason">Reason (the fault, the work order)</label>'
            f'<input id="service-reason" name="reason" type="text" required '
            f'maxlength="{SERVICE_REASON_MAX}" value="{h(entered.get("reason", ""))}"'
            f'{described}>'
            f'<label for="service-until">Until (local time, {h(zone)}; optional)</label>'
            '<input id="service-until" name="until" type="datetime-local" '
            f'value="{h(entered.get("until", ""))}"{described}>'
            '<button type="submit">Take out of service</button></form>')
    return (
        f'<section aria-labelledby="svc-h"><h3 id="svc-h">Service state</h3>{error}'
        f'<dl class="facts" id="service-state">{dl}</dl>{control}'
        '<p class="muted">Out of service, the detector\'s counts are still stored and scored, '
        'but alerts it raises are kept as suppressed (not listed as open) until it returns to '
        'service, by hand or at the until time; then its suppressed alerts still open are '
        'raised. Alerts already open stay as they are.</p></section>')


def parse_local(text: str, zone: str) -> float:
    """A local date and time typed in the form (``YYYY-MM-DDTHH:MM``) on ``zone``'s wall
    clock, in epoch s; BadInput saying what is accepted when it is not one."""
    accepted = "a local date and time YYYY-MM-DDTHH:MM"
    try:
        naive = datetime.fromisoformat(text)
    except ValueError:
        raise BadInput(f"until {text[:40]!r} is not {accepted}") from None
    if naive.tzinfo is not None:
        raise BadInput(f"until {text[:40]!r} carries a UTC offset; give {accepted} in {zone}")
    if not 1990 <= naive.year <= 2100:
        raise BadInput(f"until {text[:40]!r} is outside the years 1990..2100")
    moment = naive.replace(tzinfo=ZoneInfo(zone))
    if datetime.fromtimestamp(moment.timestamp(), ZoneInfo(zone)).replace(tzinfo=None) != naive:
        raise BadInput(f"until {text[:40]!r} does not exist in {zone} (the clocks skip it)")
    return moment.timestamp()


@router.post("/detectors/{detector_id}/service")
async def set_service(detector_id: str, request: Request) -> Response:
    fields = await form_of(request)
    session = await run_in_threadpool(require_session, request)
    session.check_csrf(fields.get("csrf"))
    if not session.may("operate"):
        return framed(session, title="Not allowed", status=403, body=(
            f'<p>Key {h(session.principal.name)} has role {h(session.principal.role)}, which may '
            'not change a detector\'s service state; that needs a key with role operate or '
            'admin.</p>'))
    settings, engine = request.app.state.settings, request.app.state.engine
    try:
        det = await run_in_threadpool(registry.get_detector, engine, detector_id)
    except NotFound:
        return framed(session, title="No such detector", status=404,
                      body=f"<p>There is no detector {h(detector_id)}.</p>")
    state = fields.get("state", "")
    reason = fields.get("reason", "").strip() or None
    until_text = fields.get("until", "").strip()
    entered = {"reason": fields.get("reason", "")[:SERVICE_REASON_MAX],
               "until": until_text[:UNTIL_MAX]}
    problem = None
    try:
        if state not in ("in_service", "out_of_service"):
            raise BadInput(f"state {state[:40]!r} is not one this page sets; it is "
                           "in_service or out_of_service")
        if reason is not None and len(reason) > SERVICE_REASON_MAX:
            raise BadInput(f"the reason is {len(reason):,} characters; a reason holds at most "
                           f"{SERVICE_REASON_MAX:,}")
        try:
            prose(reason)
        except ValueError as exc:
            raise BadInput(f"the reason {exc}") from None
        if len(until_text) > UNTIL_MAX:
            raise BadInput(f"until is over {UNTIL_MAX} characters; give a local date and time "
                           "YYYY-MM-DDTHH:MM")
        until_s = parse_local(until_text, det["timezone"]) if until_text else None
        # The same store call as PATCH /v1/detectors/{id}: its rules (a reason required, until
        # in the future and only when out of service, retiring for admins) hold here too.
        await run_in_threadpool(lambda: registry.set_service_state(
            engine, detector_id, state=state, reason=reason, until_s=until_s,
            by=session.principal.name, may_retire=session.may("admin"),
            clock=lambda conn: clock_now(conn, settings),
            period_clock=lambda conn: period_clock_now(conn, settings)))
    except (BadInput, ValidationFailed) as exc:
        problem = f"Not changed: {exc}."
    except Forbidden as exc:
        return framed(session, title="Not allowed", status=403, body=f"<p>{h(exc)}.</p>")
    if problem:
        return await run_in_threadpool(lambda: detector_view(
            request, session, detector_id, None, message=problem, entered=entered, status=400))
    return session.keep_alive(RedirectResponse(
        f"/ui/detectors/{quote(detector_id, safe='')}#svc-h", status_code=303))


# ---------------------------------------------------------------------------- wiring


def install(app: Any) -> None:
    """Add the view to the app: its routes, ``/`` redirecting to it, and its error pages."""
    from service.web.ui.session import CsrfRefused, SignInNeeded

    settings = app.state.settings
    app.state.ui_secret = (settings.ui_session_secret.encode("utf-8")
                           if settings.ui_session_secret else secrets.token_bytes(32))
    app.include_router(router)

    @app.get("/", include_in_schema=False)
    def root() -> Response:
        return RedirectResponse("/ui/", status_code=303)

    @app.exception_handler(SignInNeeded)
    async def _sign_in(request: Request, exc: SignInNeeded) -> Response:
        target = request.url.path + (f"?{request.url.query}" if request.url.query else "")
        response = RedirectResponse("/ui/login" + query(next=safe_next(target)), status_code=303)
        if request.cookies.get("tw_session"):
            clear_cookie(response, secure=is_https(request))
        return response

    @app.exception_handler(CsrfRefused)
    async def _csrf(_: Request, exc: CsrfRefused) -> Response:
        return html(page(title="Refused", body=f"<p>{h(exc)}. Reload the page and try again."
                                                "</p>"), 403)

    @app.exception_handler(BadInput)
    async def _bad(_: Request, exc: BadInput) -> Response:
        return html(page(title="Not accepted", body=f"<p>{h(exc)}.</p>"
                                                    '<p><a href="/ui/network">Back</a></p>'), 400)
