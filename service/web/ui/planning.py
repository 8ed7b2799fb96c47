"""The planners' page of the web view: one detector's standard annual figures for a year.

``/ui/detectors/{id}/figures?year=`` shows what ``GET /v1/detectors/{id}/figures`` returns
(service.pipeline.figures): AADT and ADT, the 30th highest hour, K30 and the design hour
volume, each with its interval; the days behind them and the share imputed; the data
sufficiency rule; monthly and day-of-week factors; AM and PM peak hours with their peak-hour
factors per day type; and the method of each figure. A figures run reads a year of counts
(about 0.2 s for a year of 5-minute counts), so it has its own page rather than slowing the
detector's day.
"""

from __future__ import annotations

from datetime import datetime
from typing import Annotated, Any
from zoneinfo import ZoneInfo

from fastapi import APIRouter, Query, Request
from fastapi.responses import Response

from service.errors import NotFound, TallywardError
from service.pipeline import figures as planning
from service.store import detectors as registry
from service.store import overview
from service.web.ui.pages import BadInput, SessionDep, framed, no_such_detector
from service.web.ui.render import h

router = APIRouter(prefix="/ui", include_in_schema=False)
MONTHS = ("Jan", "Feb", "Mar", "Apr", "May", "Jun", "Jul", "Aug", "Sep", "Oct", "Nov", "Dec")
WEEKDAYS = ("Mon", "Tue", "Wed", "Thu", "Fri", "Sat", "Sun")
DAY_TYPE_NAMES = {"weekday": "Weekday", "saturday": "Saturday",
                  "sunday_holiday": "Sunday or holiday"}


def _num(value: float | None, digits: int = 0) -> str:
    if value is None:
        return "–"
    return f"{value:,.{digits}f}"


def _figure_row(name: str, fig: dict[str, Any] | None, digits: int, method: str) -> str:
    if not fig or fig.get("value") is None:
        return (f'<tr><th scope="row">{h(name)}</th><td class="num">–</td><td class="num">–</td>'
                f'<td>{h(method)}</td></tr>')
    return (f'<tr><th scope="row">{h(name)}</th><td class="num">{_num(fig["value"], digits)}</td>'
            f'<td class="num">{_num(fig.get("low"), digits)} to {_num(fig.get("high"), digits)}'
            f'</td><td>{h(method)}</td></tr>')


def _factor_bars(labels: tuple[str, ...], values: list[float | None], caption: str) -> str:
    """A factor per label as a table with a small bar each (1.0 marked), readable as text."""
    known = [v for v in values if v is not None]
    top = max(known + [1.0]) * 1.05
    rows = []
    for label, v in zip(labels, values, strict=True):
        if v is None:
            rows.append(f'<tr><th scope="row">{label}</th><td class="num">–</td><td></td></tr>')
            continue
        width = v / top * 100
        one = 1.0 / top * 100
        rows.append(
            f'<tr><th scope="row">{label}</th><td class="num">{v:.3f}</td><td>'
            f'<svg class="bars" viewBox="0 0 100 10" width="100" height="10" aria-hidden="true" '
            f'focusable="false"><rect class="bar" x="0" y="1" width="{width:.1f}" height="8"/>'
            f'<rect class="bar peak" x="{one:.1f}" y="0" width="0.8" height="10"/></svg>'
            '</td></tr>')
    return (f'<table class="grid compact"><caption>{h(caption)}</caption><thead><tr>'
            '<th scope="col"></th><th scope="col">Factor</th><th scope="col">'
            '<span class="visually-hidden">Bar (mark at 1.0)</span></th></tr></thead>'
            f'<tbody>{"".join(rows)}</tbody></table>')


def _peaks(peaks: dict[str, Any] | None) -> str:
    if not peaks:
        return ('<p class="muted">Peak hours need observed 15-minute volumes; this detector '
                'reports at intervals that do not divide a quarter hour.</p>')
    rows = []
    for day_type, entry in peaks.items():
        for part, label in (("am", "AM"), ("pm", "PM")):
            p = entry.get(part) if isinstance(entry, dict) else None
            name = f"{DAY_TYPE_NAMES.get(day_type, day_type)}, {label}"
            if not p:
                rows.append(f'<tr><th scope="row">{h(name)}</th><td colspan="4" class="muted">'
                            'no day with all four quarters of an hour counted</td></tr>')
                continue
            rows.append(
                f'<tr><th scope="row">{h(name)}</th><td>{h(p["start"])}</td>'
                f'<td class="num">{p["volume"]:,}</td>'
                f'<td class="num">{p["phf"]:.2f} ({p["phf_low"]:.2f} to {p["phf_high"]:.2f})</td>'
                f'<td class="num">{p["days"]}</td></tr>')
    return ('<table class="grid compact"><caption>Peak hours and peak-hour factors (observed '
            '15-minute volumes)</caption><thead><tr><th scope="col">Day type, period</th>'
            '<th scope="col">Starts (local)</th><th scope="col">Hour volume</th>'
            '<th scope="col">Peak-hour factor (95 % interval)</th><th scope="col">Days</th>'
            f'</tr></thead><tbody>{"".join(rows)}</tbody></table>')


def figures_body(fig: dict[str, Any], *, level: float) -> str:
    """The page's body for one figures result (the JSON of the figures route)."""
    m = fig["methods"]
    days, suff = fig["days"], fig["sufficiency"]
    pct = f"{level:.0%}"
    rows = "".join([
        _figure_row("AADT", fig["aadt"], 0, m["aadt"]),
        _figure_row("ADT", fig["adt"], 0, m["adt"]),
        _figure_row("30th highest hour", fig["hv30"], 0, m["hv30"]),
        _figure_row("K30", fig["k30"], 3, m["k30"]),
        _figure_row("Design hour volume", fig["dhv"], 0, m["dhv"]),
    ])
    rule = ("met" if suff["meets_rule"] else
            f'not met: {suff["cells_with_complete_day"]} of {suff["cells_in_period"]} '
            'month and day-of-week cells have a complete day')
    from_complete = suff.get("aadt_from_complete_days_only")
    return (
        f'<p>Period {h(fig["period"]["from"])} to {h(fig["period"]["until"])}. '
        f'<strong>{fig["imputed_share"]:.1%} of the volume is imputed</strong> from the baseline '
        f'scaled by each day\'s estimated level; {days["with_data"]:,} of {days["in_period"]:,} '
        f'days have counts, {days["complete"]:,} are complete, {days["fully_imputed"]:,} are '
        f'wholly imputed. Intervals are central {pct} intervals ({h(m["intervals"])}).</p>'
        f'<p>Data sufficiency rule: {h(rule)}. {h(m["sufficiency"])}.'
        + (f' AADT from complete days only: {from_complete:,}.' if from_complete is not None
           else '') + '</p>'
        '<table class="grid compact"><caption>Annual figures</caption><thead><tr>'
        f'<th scope="col">Figure</th><th scope="col">Value</th><th scope="col">{pct} interval'
        f'</th><th scope="col">Method</th></tr></thead><tbody>{rows}</tbody></table>'
        f'{_peaks(fig.get("peak_hours"))}'
        f'<p class="muted">Peak-hour factor: {h(m["phf"])}.</p>'
        '<div class="split">'
        f'{_factor_bars(MONTHS, fig["monthly_factors"], "Monthly factors (AADT / month)")}'
        f'{_factor_bars(WEEKDAYS, fig["day_of_week_factors"], "Day-of-week factors")}'
        '</div>'
        '<p class="muted">Figures are estimates for planning from the stored counts and their '
        'quality flags; check them against the agency\'s own count program and engineering '
        'judgment before use.</p>')


@router.get("/detectors/{detector_id}/figures")
def figures_page(
    detector_id: str, request: Request, session: SessionDep,
    year: Annotated[str | None, Query(max_length=4)] = None,
) -> Response:
    settings, engine = request.app.state.settings, request.app.state.engine
    try:
        det = registry.get_detector(engine, detector_id)
    except NotFound:
        return no_such_detector(session, detector_id)
    if year:
        if not (year.isascii() and year.isdigit()) or not (
                planning.FIRST_YEAR <= int(year) <= planning.LAST_YEAR):
            raise BadInput(f"year {year!r} is not a year {planning.FIRST_YEAR}.."
                           f"{planning.LAST_YEAR}")
        chosen = int(year)
    else:
        zone = ZoneInfo(det["timezone"])
        chosen = datetime.fromtimestamp(overview.scoring_clock(engine, settings), zone).year
    back = f'/ui/detectors/{h(detector_id)}'
    form = (
        f'<form method="get" action="{back}/figures" class="filters" aria-label="Choose a year">'
        f'<a href="?year={chosen - 1}">← {chosen - 1}</a>'
        f'<label>Year <input type="number" name="year" value="{chosen}" min="'
        f'{planning.FIRST_YEAR}" max="{planning.LAST_YEAR}" required></label>'
        f'<button type="submit">Show</button><a href="?year={chosen + 1}">{chosen + 1} →</a>'
        f'</form><p><a href="{back}">Back to the detector\'s day</a> · JSON: '
        f'<code>GET /v1/detectors/{h(detector_id)}/figures?year={chosen}</code></p>')
    title = f"Planners' figures: {det['label'] or detector_id}, {chosen}"
    try:
        fig = planning.figures(engine, [detector_id], year=chosen)
    except TallywardError as exc:
        return framed(session, title=title, status=200,
                      body=f'{form}<p>No figures for {chosen}: {h(exc.message)}.</p>')
    return framed(session, title=title, body=form + figures_body(fig, level=fig["level"]))
