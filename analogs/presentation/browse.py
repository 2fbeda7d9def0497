"""The find report as a page to read and browse: the answer first, then the evidence.

Presentation only: every function lays out what it is handed (the JSON-shaped answer of
a query, the SVG maps of :mod:`analogs.presentation.svg_maps`, report lists gathered by
:func:`analogs.workflows.page.analog_days`) and returns HTML text.

The page is self-contained: one file, the style, the maps (inline SVG, their shaded
fields ``data:`` URIs) and a small script of our own inline, nothing fetched. Without the script it is a plain page (the
analog table, then each analog day's map and reports one below the other, linked from
the table); with it the table sorts by any column, filters by regime, largest distance
and kind of report, and shows one analog day at a time beside the table.
"""

from __future__ import annotations

import html
import json
import math

from analogs.presentation.svg_maps import MARKER_SHAPES, map_view

#: Colours of the page, sampled from matplotlib's viridis (perceptually uniform):
#: the analogs' probability in its middle, the accents at its dark end; the
#: climatology is a neutral grey, never a hue that reads as a level of danger.
VIRIDIS_DARK, VIRIDIS_MID = "#3b528b", "#21918c"
BASE_RATE_GREY = "#8c8c8c"


def marker_svg(marker: str, colour: str) -> str:
    """A small inline SVG of a grid marker (decorative: the kind is written beside it)."""
    shape = MARKER_SHAPES.get(marker, MARKER_SHAPES["o"])
    return (f'<svg class="marker" viewBox="0 0 10 10" aria-hidden="true" focusable="false">'
            f'<g fill="{_e(colour)}" stroke="#000" stroke-width=".7">{shape}</g></svg>')


def _e(value) -> str:
    return html.escape(str(value), quote=True)


def _known(value) -> bool:
    """Not None and not NaN (the JSON-shaped answer may carry either for 'undefined')."""
    return value is not None and not (isinstance(value, float) and math.isnan(value))


def _percent(value, digits=0) -> str:
    if not _known(value):
        return "n/a"
    return f"{100.0 * value:.{digits}f}%"


def _bar(value, colour, label) -> str:
    """A horizontal bar on a 0-100 % scale (inline SVG; the number is beside it)."""
    share = max(0.0, min(1.0, float(value))) if _known(value) else 0.0
    return (f'<svg class="bar" viewBox="0 0 100 6" preserveAspectRatio="none" role="img" '
            f'aria-label="{_e(label)}"><rect width="100" height="6" class="track"/>'
            f'<rect width="{100 * share:.2f}" height="6" fill="{colour}"/></svg>')


def _probability_row(name, analogs, climatology, extra="") -> str:
    return (f'<tr><th scope="row">{_e(name)}</th>'
            f'<td class="num strong">{_percent(analogs)}</td>'
            f'<td>{_bar(analogs, VIRIDIS_MID, f"{name}: analogs {_percent(analogs)}")}'
            f'{_bar(climatology, BASE_RATE_GREY, f"{name}: base rate {_percent(climatology)}")}'
            f'</td><td class="num">{_percent(climatology)}</td><td class="num">{extra}</td></tr>')


def answer_section(data: dict, skill_text: str) -> str:
    """The answer to the forecaster's question, first: P(at least one event in the
    region) beside the season's base rate, per kind, the measured skill, then the
    target's regime and the diagnostics that decided it."""
    outcomes = data["outcomes"]
    parts = [('<section id="answer" aria-labelledby="answer-h">'
              '<h2 id="answer-h">What days like this produced</h2>')]
    if not outcomes.get("has_events", True):
        parts.append("<p>No events table in this store: outcome statistics are not "
                     "available (build with --events FILE).</p>")
    else:
        n = outcomes["n_analogs"]
        p, base = outcomes["p_any_event"], outcomes["climatology_p_any_event"]
        ci = outcomes.get("p_any_event_ci")
        ratio = (f"{p / base:.1f} times the base rate" if _known(p) and _known(base) and base
                 else "")
        parts.append(
            f'<div class="headline"><div class="big" id="p-any">{_percent(p)}</div>'
            f'<div><p>of the <strong>{n}</strong> closest past days had at least one '
            f'event in the region'
            + (f" (binomial interval {_percent(ci[0])} to {_percent(ci[1])} from having "
               f"only {n} days)" if ci else "")
            + f'.</p><p>Base rate in this season: <strong id="base-rate">{_percent(base)}'
            f'</strong>' + (f"; the analogs give {ratio}." if ratio else ".") + "</p></div></div>")
        unknown = outcomes.get("n_analogs_without_reports", 0)
        if unknown:
            parts.append(f"<p>{unknown} of the {n + unknown} analog days have no reports yet "
                         f"(days the events table does not cover): the figures count the "
                         f"{n} with reports.</p>")
        rows = [_probability_row("any kind", p, base, f"{outcomes['mean_events']:.2f}")]
        for kind, stats in sorted(outcomes.get("by_kind", {}).items()):
            rows.append(_probability_row(kind, stats["p_any"], stats.get("climatology_p_any"),
                                         f"{stats['mean']:.2f}"))
        parts.append('<table class="answer"><caption>At least one event in the region, by '
                     'kind: analog days (teal) against the season base rate (grey)</caption>'
                     '<thead><tr><th scope="col">kind</th><th scope="col">analogs</th>'
                     '<th scope="col"><span class="sr">bars</span></th>'
                     '<th scope="col">base rate</th><th scope="col">mean count</th></tr>'
                     "</thead><tbody>" + "".join(rows) + "</tbody></table>")
        weighted = outcomes.get("weighted")
        if weighted:
            parts.append(f"<p>Weighted by similarity ({weighted['n_effective']:.1f} effective "
                         f"analogs): {_percent(weighted['p_any_event'])}.</p>")
        spread = (outcomes.get("member_spread") or {}).get("p_any_event")
        if spread:
            parts.append("<p>Spread across ensemble members: " + ", ".join(
                f"{key} {_percent(spread[key])}" for key in ("min", "median", "max"))
                + ".</p>")
        if skill_text:
            parts.append(f'<p class="skill" id="skill">{_e(skill_text)}</p>')
    parts.append(regime_block(data))
    parts.append("</section>")
    return "\n".join(parts)


def _diagnostic_value(entry) -> str:
    value, units = entry.get("value"), entry.get("units") or ""
    if value is None:
        return "n/a"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        text = f"{value:.3g}" if abs(value) < 0.01 or abs(value) >= 1e4 else f"{value:.1f}"
    else:
        text = str(value)
    return text if units in ("", "1") else f"{text} {units}"


def regime_block(data: dict) -> str:
    """The target's regime, its confidence, why (the rule's reason) and every diagnostic."""
    target = data["target"]
    if "members" in data:
        shares = ", ".join(f"{_e(label)} {100 * share:.0f}%" for label, share
                           in (target.get("regime_probabilities") or {}).items())
        head = (f'<p class="regime">Regime: <strong id="target-regime">{_e(target["regime"])}'
                f'</strong> in {100 * target["regime_confidence"]:.0f}% of the '
                f'{len(data["members"])} members ({shares}).</p>')
    else:
        head = (f'<p class="regime">Regime of the target: <strong id="target-regime">'
                f'{_e(target["regime"])}</strong> (confidence '
                f'{target["regime_confidence"]:.2f}).</p>')
    parts = ['<div class="why"><h3>Regime and why</h3>', head]
    if target.get("reason"):
        parts.append(f'<p id="regime-reason"><strong>Why:</strong> {_e(target["reason"])}</p>')
    region = (target.get("diagnostic_region") or {}).get("description")
    if region:
        parts.append(f"<p>Diagnosed over the {_e(region)}.</p>")
    diagnostics = target.get("diagnostics") or {}
    if diagnostics:
        rows = "".join(f'<tr><th scope="row">{_e(name)}</th><td class="num">'
                       f"{_e(_diagnostic_value(entry))}</td></tr>"
                       for name, entry in diagnostics.items() if isinstance(entry, dict))
        parts.append(f"<details><summary>All {len(diagnostics)} diagnostics of the target"
                     f'</summary><table class="diagnostics"><tbody>{rows}</tbody></table>'
                     "</details>")
    parts.append("</div>")
    return "\n".join(parts)


def _regimes(analogs) -> list[str]:
    return sorted({a["regime"] for a in analogs})


def browser_section(data: dict, days: dict | None = None) -> str:
    """The evidence to browse: the analog table (sortable, filterable) and each analog
    day's map and reports. ``days``: rank -> {"tile": PNG bytes or None, "alt": text,
    "reports": list of dicts (time, kind, magnitude, lat, lon, in_region)}, as gathered
    by :func:`analogs.workflows.page.analog_days`."""
    analogs = data["analogs"]
    days = days or {}
    kinds = sorted({k for a in analogs for k in a["events"]["by_kind"]})
    ensemble = "members" in data
    columns = [("rank", "rank", "num"), ("date", "date", "text")]
    if ensemble:
        columns.append(("members", "members", "num"))
    columns += [("distance", "distance", "num"), ("regime", "regime", "text"),
                ("events", "events in region", "num")]
    columns += [(f"kind-{k}", k, "num") for k in kinds]
    head = "".join(
        f'<th scope="col" data-key="{_e(key)}" data-type="{kind}" aria-sort="none">'
        f'<button type="button" class="sort">{_e(label)}<span class="arrow" '
        f'aria-hidden="true"></span></button></th>'
        for key, label, kind in columns)
    body = []
    for a in analogs:
        total = a["events"]["total"]
        by_kind = a["events"]["by_kind"]
        values = {"rank": a["rank"], "date": a["date"], "members": a.get("n_members", ""),
                  "distance": f"{a['distance']:.2f}", "regime": a["regime"],
                  "events": "no reports yet" if total is None else total}
        values.update({f"kind-{k}": "" if total is None else by_kind.get(k, 0) for k in kinds})
        # Sorted and filtered on the full values (the cells show them rounded); a day
        # without reports yet sorts below zero events.
        data_values = {**values, "distance": repr(float(a["distance"]))}
        if total is None:
            data_values.update({key: -1 for key, _, _ in columns
                                if key == "events" or key.startswith("kind-")})
        attrs = " ".join(f'data-{key}="{_e(data_values[key])}"' for key, _, _ in columns)
        cells = []
        for key, _, kind in columns:
            text = _e(values[key])
            if key == "date":
                text = f'<a href="#analog-{a["rank"]}">{text}</a>'
            cells.append(f'<td class="{kind}">{text}</td>')
        body.append(f'<tr id="row-{a["rank"]}" data-target="analog-{a["rank"]}" {attrs}>'
                    + "".join(cells) + "</tr>")
    regime_options = "".join(f'<option value="{_e(r)}">{_e(r)}</option>'
                             for r in _regimes(analogs))
    kind_options = "".join(f'<option value="kind-{_e(k)}">at least one {_e(k)}</option>'
                           for k in kinds)
    largest = max((a["distance"] for a in analogs), default=0.0)
    controls = (
        '<form class="controls" id="controls" hidden onsubmit="return false">'
        '<label>regime <select id="filter-regime"><option value="">all regimes</option>'
        f"{regime_options}</select></label>"
        '<label>reports <select id="filter-kind"><option value="">any, or none</option>'
        f'<option value="events">at least one event</option>{kind_options}</select></label>'
        f'<label>distance up to <input type="number" id="filter-distance" min="0" '
        f'step="0.05" value="{math.ceil(largest * 100) / 100:.2f}"></label>'
        '<output id="shown" aria-live="polite"></output></form>')
    table = (f'<table id="analogs" class="analogs"><caption>The closest past days: '
             f"{len(analogs)} analog days (distance in the "
             + ("event-weighted EOF space" if (data.get("settings") or {}).get("metric")
                == "event_weighted" else "EOF space")
             + "; events counted in the "
             f"outcome region). Select a day to see its map and reports.</caption>"
             f"<thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>")
    details = "".join(day_detail(a, days.get(a["rank"]) or {}) for a in analogs)
    return ('<section id="evidence" aria-labelledby="evidence-h"><h2 id="evidence-h">'
            "The evidence: the analog days</h2>" + controls
            + f'<div class="browse"><div class="list">{table}</div>'
            f'<div class="days" id="days">{details}</div></div></section>')


def day_detail(analog: dict, day: dict) -> str:
    """One analog day: its map (the grid's, shown again larger) and its reports."""
    rank = analog["rank"]
    total = analog["events"]["total"]
    parts = [f'<article class="day" id="analog-{rank}" aria-labelledby="analog-{rank}-h">'
             f'<h3 id="analog-{rank}-h">#{rank} {_e(analog["date"])}: {_e(analog["regime"])}, '
             f'distance {analog["distance"]:.2f}, '
             + ("no reports yet" if total is None else f"{total} event{'s' * (total != 1)} "
                "in region") + "</h3>"]
    if day.get("tile"):
        parts.append(map_view(day["tile"], day.get("alt") or "map of " + analog["date"]))
    markers = day.get("markers") or {}
    if day.get("tile"):
        parts.append(f'<p class="key">Map {_e(day.get("extent", ""))}: 500 hPa height every '
                     "60 gpm; dashed box: the outcome region"
                     + ("; markers: " + ", ".join(f"{marker_svg(*markers[kind])} {_e(kind)}"
                                                  for kind in markers) if markers else "")
                     + ".</p>")
    reports = day.get("reports")
    if reports is None:
        parts.append("<p>No report list for this day.</p>")
    elif not reports:
        parts.append("<p>No reports on the map that day.</p>")
    else:
        rows = "".join(
            f'<tr><td class="text">{_e(r["time"])}</td><td class="text">'
            + (marker_svg(*markers[r["kind"]]) + " " if r["kind"] in markers else "")
            + f'{_e(r["kind"])}</td>'
            f'<td class="num">{_e(r["magnitude"])}</td><td class="num">{_e(r["lat"])}</td>'
            f'<td class="num">{_e(r["lon"])}</td><td class="text">'
            f'{"yes" if r["in_region"] else "no"}</td></tr>'
            for r in reports)
        parts.append(f'<div class="scroll"><table class="reports"><caption>{len(reports)} report'
                     f"{'s' * (len(reports) != 1)} of the convective day on the map</caption>"
                     '<thead><tr><th scope="col">UTC (month-day time)</th><th scope="col">kind</th>'
                     '<th scope="col">magnitude</th><th scope="col">lat</th>'
                     '<th scope="col">lon</th><th scope="col">in region</th></tr></thead>'
                     f"<tbody>{rows}</tbody></table></div>")
    parts.append("</article>")
    return "".join(parts)


STYLE = """
:root{--ink:#1d2330;--muted:#5b6270;--line:#d9dce3;--accent:%(dark)s;--teal:%(mid)s;--soft:#eef3f6}
*{box-sizing:border-box}
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;margin:0;color:var(--ink);line-height:1.45;background:#fafbfc}
main{max-width:78em;margin:0 auto;padding:1.2em 1.5em 3em}
h1{font-size:1.45em;margin:.2em 0 .4em}h2{font-size:1.2em;margin:1.6em 0 .5em;color:var(--accent)}
h3{font-size:1.02em;margin:.8em 0 .4em}
.caution{border:1px solid var(--line);border-left:6px solid var(--accent);background:#fff;padding:.6em 1em;margin:.6em 0 1em}
.headline{display:flex;gap:1.2em;align-items:center;background:#fff;border:1px solid var(--line);border-radius:6px;padding:.8em 1.2em}
.headline p{margin:.2em 0}.big{font-size:3.2em;font-weight:700;color:var(--teal);font-variant-numeric:tabular-nums;min-width:3.2em;text-align:right}
table{border-collapse:collapse;margin:.6em 0;font-variant-numeric:tabular-nums}
caption{text-align:left;color:var(--muted);font-size:.9em;padding-bottom:.3em}
th,td{padding:.25em .55em;border-bottom:1px solid var(--line)}
td.num,th.num,.num{text-align:right}td.text{text-align:left}
.answer td{min-width:4em}.strong{font-weight:700}
svg.bar{display:block;width:14em;height:.55em;margin:.15em 0}svg.bar .track{fill:#e7e9ee}
.skill{color:var(--muted)}.why{background:#fff;border:1px solid var(--line);border-radius:6px;padding:.2em 1em .6em;margin-top:1em}
.regime strong{color:var(--accent)}
.controls[hidden]{display:none}.controls{display:flex;flex-wrap:wrap;gap:1em;align-items:center;margin:.4em 0}
.controls select,.controls input{font:inherit;padding:.15em .3em}.controls input{width:5.5em}
.browse{display:grid;grid-template-columns:minmax(0,1fr);gap:1.2em}
.js .browse{grid-template-columns:max-content minmax(18em,1fr)}
table.analogs thead th{background:var(--soft);position:sticky;top:0}
th button.sort{font:inherit;font-weight:600;background:none;border:0;padding:0;cursor:pointer;color:inherit}
th[aria-sort=ascending] .arrow::after{content:" \\25B2"}th[aria-sort=descending] .arrow::after{content:" \\25BC"}
table.analogs tbody tr{cursor:pointer}table.analogs td:nth-child(2),.reports td:nth-child(-n+2){white-space:nowrap}
svg.marker{width:.8em;height:.8em;vertical-align:-.05em}.key{font-size:.9em;color:var(--muted)}
.settings th{text-align:left}table.analogs tbody tr:hover{background:var(--soft)}
table.analogs tbody tr[aria-selected=true]{background:#d8ecea;outline:2px solid var(--teal)}
tr:focus,button:focus,a:focus,select:focus,input:focus{outline:3px solid var(--accent);outline-offset:1px}
.day{background:#fff;border:1px solid var(--line);border-radius:6px;padding:.2em 1em 1em;margin-bottom:1em}
@media (max-width:60em){.js .browse{grid-template-columns:minmax(0,1fr)}}
.js .day{display:none}.js .day.shown{display:block;position:sticky;top:.5em}
img,svg.map{max-width:100%%;height:auto}svg.tile{display:block;width:100%%;max-width:32em;height:auto;border:1px solid var(--line)}
.reports{font-size:.9em}.reports th,.reports td{padding:.2em .4em}.scroll{overflow-x:auto}.figures figure{margin:1em 0}figcaption{color:var(--muted);font-size:.9em}
.sr{position:absolute;left:-9999px}
pre{white-space:pre-wrap;font-size:.85em}
""" % {"dark": VIRIDIS_DARK, "mid": VIRIDIS_MID}

#: The page's own script: sort, filter and select. Keys: Enter or Space on a row selects
#: it; the headers are buttons (Tab to reach them).
SCRIPT = r"""
(function () {
  document.documentElement.classList.add('js');
  var table = document.getElementById('analogs');
  if (!table) { return; }
  var body = table.tBodies[0];
  var rows = Array.prototype.slice.call(body.rows);
  var controls = document.getElementById('controls');
  var regime = document.getElementById('filter-regime');
  var kind = document.getElementById('filter-kind');
  var distance = document.getElementById('filter-distance');
  var shown = document.getElementById('shown');
  controls.hidden = false;

  function value(row, key, type) {
    var text = row.getAttribute('data-' + key);
    return type === 'num' ? parseFloat(text) : text;
  }
  function select(row, focus) {
    rows.forEach(function (r) { r.setAttribute('aria-selected', 'false'); });
    document.querySelectorAll('.day.shown').forEach(function (d) { d.classList.remove('shown'); });
    if (!row) { return; }
    row.setAttribute('aria-selected', 'true');
    var day = document.getElementById(row.getAttribute('data-target'));
    if (day) { day.classList.add('shown'); }
    if (focus) { row.focus(); }
  }
  function filter() {
    var wantRegime = regime.value, wantKind = kind.value;
    var most = parseFloat(distance.value);
    var count = 0, first = null, selectedVisible = false;
    rows.forEach(function (row) {
      var keep = (!wantRegime || row.getAttribute('data-regime') === wantRegime)
        && (!wantKind || parseFloat(row.getAttribute('data-' + wantKind)) > 0)
        && (isNaN(most) || parseFloat(row.getAttribute('data-distance')) <= most);
      row.hidden = !keep;
      if (keep) {
        count += 1;
        if (!first) { first = row; }
        if (row.getAttribute('aria-selected') === 'true') { selectedVisible = true; }
      }
    });
    shown.textContent = 'showing ' + count + ' of ' + rows.length + ' analog days';
    if (!selectedVisible) { select(first, false); }
  }
  function sort(th) {
    var key = th.getAttribute('data-key'), type = th.getAttribute('data-type');
    var ascending = th.getAttribute('aria-sort') !== 'ascending';
    table.querySelectorAll('th[data-key]').forEach(function (h) { h.setAttribute('aria-sort', 'none'); });
    th.setAttribute('aria-sort', ascending ? 'ascending' : 'descending');
    rows.sort(function (a, b) {
      var x = value(a, key, type), y = value(b, key, type);
      var order = x < y ? -1 : x > y ? 1 : 0;
      if (order === 0) { order = value(a, 'rank', 'num') - value(b, 'rank', 'num'); return order; }
      return ascending ? order : -order;
    });
    rows.forEach(function (row) { body.appendChild(row); });
  }
  table.querySelectorAll('th[data-key] button').forEach(function (button) {
    button.addEventListener('click', function () { sort(button.parentNode); });
  });
  rows.forEach(function (row) {
    row.tabIndex = 0;
    row.setAttribute('aria-selected', 'false');
    row.addEventListener('click', function (event) {
      if (event.target.tagName === 'A') { event.preventDefault(); }
      select(row, false);
    });
    row.addEventListener('keydown', function (event) {
      if (event.key === 'Enter' || event.key === ' ') { event.preventDefault(); select(row, false); }
      else if (event.key === 'ArrowDown' || event.key === 'ArrowUp') {
        var visible = rows.filter(function (r) { return !r.hidden; });
        var next = visible[visible.indexOf(row) + (event.key === 'ArrowDown' ? 1 : -1)];
        if (next) { event.preventDefault(); next.focus(); }
      }
    });
  });
  [regime, kind].forEach(function (c) { c.addEventListener('change', filter); });
  distance.addEventListener('input', filter);
  var wanted = location.hash && document.querySelector('tr[data-target="' + location.hash.slice(1) + '"]');
  select(wanted || rows[0], false);
  filter();
})();
"""


def figures_section(figures) -> str:
    """The report's maps, each a figure: its SVG (which holds its descriptive alt text)
    and its caption."""
    parts = []
    for caption, svg, *_ in figures:
        parts.append(f"<figure>{svg}<figcaption>{_e(caption)}</figcaption></figure>")
    if not parts:
        return ""
    return ('<section id="maps" class="figures" aria-labelledby="maps-h"><h2 id="maps-h">'
            "Maps: the target, the analogs together, where they had events</h2>"
            + "".join(parts) + "</section>")


def page(title: str, caution: str, sections: list[str], footer: str) -> str:
    """The whole page: title, the caution at the top, the sections, the script last."""
    return "\n".join([
        "<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{_e(title)}</title><style>{STYLE}</style></head><body><main>",
        f"<h1>{_e(title)}</h1>",
        f'<p class="caution" role="note"><strong>Caution.</strong> {_e(caution)}</p>',
        *sections, footer, f"</main><script>{SCRIPT}</script></body></html>"])


def settings_table(settings: dict) -> str:
    """The query's settings as a two-column table (nested values as compact JSON)."""
    rows = "".join(
        f'<tr><th scope="row" class="text">{_e(key)}</th><td class="text">'
        f"{_e(value if isinstance(value, (str, int, float)) else json.dumps(value))}</td></tr>"
        for key, value in settings.items())
    return f'<table class="settings"><tbody>{rows}</tbody></table>'
