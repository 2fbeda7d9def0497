"""Presentation of results: terminal tables, JSON and self-contained HTML pages.

Nothing here computes statistics; it only lays out what the other stages return.
"""

from __future__ import annotations

import base64
import html
import json
import math

from analogs import CAUTION, __version__
from analogs.parameters import P


def _fmt_probability(value) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "  n/a"
    return f"{100.0 * value:5.1f}%"


def _fmt_interval(interval) -> str:
    if not interval:
        return ""
    lo, hi = interval
    return f"[{100.0 * lo:.0f}-{100.0 * hi:.0f}%]"


def _percent(value) -> str:
    """A base rate as a percentage: one decimal below 10 %, where rare events live."""
    return f"{100 * value:.1f}%" if value < 0.1 else f"{100 * value:.0f}%"


def _with_caution(lines) -> str:
    """A terminal text's lines, then a blank line and the caution every output carries."""
    return "\n".join([*lines, "", CAUTION])


def _skill_settings_text(settings) -> str:
    """The query settings a skill was measured with that narrow or weigh its analogs,
    as words after "for this region" ('' for the plain query)."""
    parts = []
    if settings.get("regime") is not None:
        parts.append(f"analogs of regime {settings['regime']} only")
    if settings.get("sequence_days"):
        n = settings["sequence_days"]
        parts.append(f"sequences with the {n} preceding day{'s' if n > 1 else ''}")
    if settings.get("weights", P.weights.default) != P.weights.default:
        parts.append(f"analogs weighted ({settings['weights'].replace('_', ' ')})")
    if settings.get("exclude_days", P.exclude.default) != P.exclude.default:
        parts.append(f"{settings['exclude_days']} days around each target left out")
    return (" with " + ", ".join(parts)) if parts else ""


def skill_line(skill) -> str:
    """One line on what this query's guidance has been worth (cross-validated), or ''."""
    if not skill:
        return ""
    where = "this region" + (f" and kinds {', '.join(skill['kinds'])}" if skill.get("kinds")
                             else "")
    where += _skill_settings_text(skill.get("settings") or {})
    caveat = f"; not measured: {skill['not_measured']}" if skill.get("not_measured") else ""
    if skill.get("measured") is False:
        reason = f" ({skill['reason']})" if skill.get("reason") else ""
        return (f"Worth in the past: not measured for {where}{reason}; measure it with: "
                f"{skill['command']}{caveat}")
    lo, hi = skill["brier_skill_score_ci"]
    text = (f"Worth in the past for {where} (leave-one-year-out hindcast of P(any report), "
            f"{skill.get('source', 'build')}): Brier skill score "
            f"{skill['brier_skill_score']:.2f} vs season climatology (0 = no better, 1 = "
            f"perfect; 90% range over resampled years {lo:.2f} to {hi:.2f})")
    if skill.get("base_rate") is not None:
        narrowed = (skill.get("settings") or {}).get("regime") is not None or \
            (skill.get("settings") or {}).get("sequence_days")
        text += (f", base rate {_percent(skill['base_rate'])} of "
                 + (f"the days forecast ({skill['days_forecast']}, all year)" if narrowed
                    else "days (all year)"))
    text += f", ROC area {skill['roc_auc']:.2f}"
    if skill.get("month_brier_skill_score") is not None:
        text += f"; in month {skill['month']}: {skill['month_brier_skill_score']:.2f}"
        if skill.get("month_brier_skill_score_ci"):
            m_lo, m_hi = skill["month_brier_skill_score_ci"]
            text += f" ({m_lo:.2f} to {m_hi:.2f})"
        if skill.get("month_base_rate") is not None:
            text += f", base rate {_percent(skill['month_base_rate'])} of its days"
    return text + caveat


def _find_data(result) -> dict:
    """The JSON-shaped answer of a query: ``result`` is a
    :class:`~analogs.results.FindResult` or its ``to_dict()``."""
    return result if isinstance(result, dict) else result.to_dict()


def find_text(result) -> str:
    """A readable terminal summary of one query (a :class:`~analogs.results.FindResult`
    or its ``to_dict()``)."""
    data = _find_data(result)
    if "valid_times" in data:
        return valid_times_text(data)
    if "members" in data:
        return ensemble_text(data)
    target, outcomes, settings = data["target"], data["outcomes"], data["settings"]
    lines = []
    when = target["date"] or "field without valid time"
    lines.append(f"Target {when}: regime {target['regime']} "
                 f"(confidence {target['regime_confidence']:.2f})")
    if target.get("reason"):
        lines.append(f"  why: {target['reason']}")
    if (target.get("diagnostic_region") or {}).get("description"):
        lines.append(f"  diagnosed over the {target['diagnostic_region']['description']}")
    lines.append(f"Region {settings['region'].get('label', settings['region'])}; "
                 f"season window +/-{settings['window_days']} d; "
                 f"{settings['n_modes']} EOF modes"
                 + (f"; {settings['metric'].replace('_', '-')} distances (--metric)"
                    if settings.get("metric") else ""))
    lines.append("")
    kinds = sorted({k for a in data["analogs"] for k in a["events"]["by_kind"]})
    header = f"{'rank':>4}  {'date':10}  {'distance':>9}  {'regime':14}  {'events':>6}"
    header += "".join(f"  {k[:8]:>8}" for k in kinds)
    lines.append(header)
    lines.append("-" * len(header))
    for analog in data["analogs"]:
        line = (f"{analog['rank']:>4}  {analog['date']:10}  {analog['distance']:9.2f}  "
                f"{analog['regime']:14}  ")
        if analog["events"]["total"] is None:  # a day without report coverage (issue 13)
            line += "no reports yet"
        else:
            line += f"{analog['events']['total']:>6}"
            line += "".join(f"  {analog['events']['by_kind'].get(k, 0):>8}" for k in kinds)
        lines.append(line)
    lines.append("")
    n = outcomes["n_analogs"]
    unknown = outcomes.get("n_analogs_without_reports", 0)
    if not outcomes.get("has_events", True):
        lines.append("No events table in this store: outcome statistics are not available "
                     "(build with --events FILE).")
    else:
        if unknown:
            lines.append(f"{unknown} of the {n + unknown} analogs have no reports yet (days "
                         "the events table does not cover): the statistics count the "
                         f"{n} with reports.")
        lines.append(f"P(at least one event in region), {n} analogs: "
                     f"{_fmt_probability(outcomes['p_any_event'])} "
                     f"{_fmt_interval(outcomes.get('p_any_event_ci'))}   "
                     f"season climatology: {_fmt_probability(outcomes['climatology_p_any_event'])}")
        if outcomes.get("p_any_event_ci"):
            lines.append(f"  the bracket is the uncertainty from having only {n} analogs "
                         "(binomial), not the range of today's probability")
        weighted = outcomes.get("weighted")
        if weighted:
            lines.append(f"  weighted by similarity ({weighted['n_effective']:.1f} effective analogs): "
                         f"{_fmt_probability(weighted['p_any_event'])} "
                         f"{_fmt_interval(weighted.get('p_any_event_ci'))}")
        lines.append(f"Mean events per analog day: {outcomes['mean_events']:.2f}")
        lines.extend(_kind_lines(outcomes))
        skill = skill_line(outcomes.get("skill"))
        if skill:
            lines.append(skill)
    return _with_caution(lines)


def _kind_lines(outcomes) -> list[str]:
    """One terminal line per kind of report: P(at least one) and the mean count."""
    return [f"  {kind:10} P(any) {_fmt_probability(stats['p_any'])}   mean {stats['mean']:.2f}"
            for kind, stats in sorted(outcomes.get("by_kind", {}).items())]


def _fmt_spread(spread) -> str:
    """"min 30.0%, median 45.0%, max 60.0%" of a member-spread entry."""
    return ", ".join(f"{key} {_fmt_probability(spread[key]).strip()}"
                     for key in ("min", "median", "max"))


def _regime_shares(target) -> str:
    shares = target.get("regime_probabilities") or {}
    return ", ".join(f"{label} {100 * share:.0f}%" for label, share in shares.items())


def ensemble_text(result) -> str:
    """The terminal summary of an ensemble target: one compact line per member (regime,
    P(at least one event) with its interval, mean events, closest analogs), then the
    outcomes pooled over the members with their spread."""
    data = _find_data(result)
    target, outcomes, settings = data["target"], data["outcomes"], data["settings"]
    members = data["members"]
    spread = outcomes.get("member_spread") or {}
    when = target.get("valid_time") or target["date"]
    lines = [(f"Target {when}, ensemble of {len(members)} members: regime "
              f"{target['regime']} in {100 * target['regime_confidence']:.0f}% of members "
              f"({_regime_shares(target)})")]
    mean = target.get("ensemble_mean")
    if mean:
        lines.append(f"  ensemble mean field: {mean['regime']} (confidence "
                     f"{mean['regime_confidence']:.2f})")
    if target.get("uncovered_fraction"):
        lines.append(f"  {100 * target['uncovered_fraction']:.1f}% of the store grid "
                     "outside the field: projected on the covered points")
    lines.append(f"Region {settings['region'].get('label', settings['region'])}; "
                 f"season window +/-{settings['window_days']} d; {settings['n_modes']} EOF "
                 f"modes; {settings['top']} analogs per member")
    lines.append("")
    header = (f"{'member':>8}  {'regime':14}  {'conf':>4}  {'P(any event)':>16}  "
              f"{'mean':>5}  closest analogs")
    lines += [header, "-" * len(header)]
    for member in members:
        stats = member["outcomes"]
        closest = " ".join(a["date"] for a in member["analogs"][:3])
        lines.append(f"{str(member['member'])[:8]:>8}  {member['regime'][:14]:14}  "
                     f"{member['regime_confidence']:4.2f}  "
                     f"{_fmt_probability(stats['p_any_event'])} "
                     f"{_fmt_interval(stats.get('p_any_event_ci')):>10}  "
                     f"{stats['mean_events']:5.2f}  {closest}")
    lines.append("")
    if not outcomes.get("has_events", True):
        lines.append("No events table in this store: outcome statistics are not available "
                     "(build with --events FILE).")
    else:
        lines.append(
            f"Pooled over {len(members)} members ({outcomes['n_analogs']} analogs, "
            f"{spread.get('n_distinct_days', '?')} distinct days): P(at least one event in "
            f"region) {_fmt_probability(outcomes['p_any_event']).strip()} "
            f"{_fmt_interval(outcomes.get('p_any_event_ci'))}, "
            f"{_fmt_interval(spread.get('p_any_event_ci_effective'))} counting each day once "
            f"({spread.get('n_effective', float('nan')):.1f} effective analogs); season "
            f"climatology {_fmt_probability(outcomes['climatology_p_any_event']).strip()}")
        if spread.get("p_any_event"):
            lines.append(f"  spread across members: {_fmt_spread(spread['p_any_event'])}")
        mean_spread = spread.get("mean_events") or {}
        lines.append(f"Mean events per analog day: {outcomes['mean_events']:.2f}"
                     + (f" (members {mean_spread['min']:.2f} to {mean_spread['max']:.2f})"
                        if mean_spread else ""))
        lines.extend(_kind_lines(outcomes))
        agreed = [a for a in data["analogs"] if a.get("n_members", 0) > 1][:5]
        if agreed:
            lines.append("Days chosen by most members: " + ", ".join(
                f"{a['date']} ({a['n_members']})" for a in agreed))
        skill = skill_line(outcomes.get("skill"))
        if skill:
            lines.append(skill)
    return _with_caution(lines)


def valid_times_text(result) -> str:
    """The terminal table of a target file's several valid times: regime and
    P(at least one event) by valid time (for an ensemble, the most frequent regime with
    its share of members and the range of the members' probabilities)."""
    data = _find_data(result)
    answers = data["valid_times"]
    first = answers[0]["settings"]
    lines = [f"{len(answers)} valid times of {data['settings'].get('field', 'the field')}; "
             f"region {first['region'].get('label', first['region'])}; season window "
             f"+/-{first['window_days']} d; {first['top']} analogs"
             + (" per member" if "members" in answers[0] else ""), ""]
    ensemble = any("members" in answer for answer in answers)
    header = (f"{'valid time':20}  {'regime':24}  {'P(any event)':>16}  "
              + (f"{'members':>9}  " if ensemble else "")
              + f"{'climatology':>11}  {'mean':>5}  closest analog")
    lines += [header, "-" * len(header)]
    for answer in answers:
        target, outcomes = answer["target"], answer["outcomes"]
        regime = f"{target['regime']} ({target['regime_confidence']:.2f})"
        spread = (outcomes.get("member_spread") or {}).get("p_any_event")
        members = (f"{100 * spread['min']:.0f}-{100 * spread['max']:.0f}%" if spread
                   else "")
        closest = answer["analogs"][0] if answer["analogs"] else None
        lines.append(
            f"{target.get('valid_time', target['date']):20}  {regime[:24]:24}  "
            f"{_fmt_probability(outcomes['p_any_event'])} "
            f"{_fmt_interval(outcomes.get('p_any_event_ci')):>10}  "
            + (f"{members:>9}  " if ensemble else "")
            + f"{_fmt_probability(outcomes['climatology_p_any_event']):>11}  "
            f"{outcomes['mean_events']:5.2f}  "
            + (f"{closest['date']} ({closest['distance']:.2f})" if closest else ""))
    if ensemble:
        lines.append("")
        lines.append("regime: the most frequent among the members (share of members); "
                     "members: range of the members' P(any event)")
    return _with_caution(lines)


def _skill_table(summary: dict) -> list[str]:
    """The analogs beside their same-fold baselines (older summaries: random analogs only)."""
    columns = [("analogs", summary)]
    baselines = summary.get("baselines")
    if baselines:
        columns += [("logistic regr.", baselines["logistic_regression"]),
                    ("random analogs", baselines["random_analogs"]),
                    ("season clim.", baselines["season_climatology"])]
    else:
        columns.append(("random analogs", summary["random_analogs"]))

    def cell(value, fmt):
        return f"{'-':>17}" if value is None or value != value else f"{value:{fmt}}"

    def interval(scores):
        lo, hi = scores.get("brier_skill_score_ci") or (None, None)
        return f"{'-':>17}" if lo is None else f"{f'[{lo:.3f}, {hi:.3f}]':>17}"

    rows = [("Brier score", "brier_score", "17.4f"),
            ("Brier skill score", "brier_skill_score", "17.3f"),
            ("  interval (year bootstrap)", None, None),
            ("ROC area, whole year", "roc_auc", "17.3f"),
            ("ROC area within the month", "roc_auc_within_month", "17.3f"),
            ("reliability / Brier score", "reliability_share", "17.3f")]
    lines = [f"{'score (same days, same folds)':30}"
             + "".join(f"{name:>17}" for name, _ in columns)]
    for label, key, fmt in rows:
        if key is not None and not any(key in scores for _, scores in columns):
            continue
        lines.append(f"{label:30}" + "".join(
            interval(scores) if key is None else cell(scores.get(key), fmt)
            for _, scores in columns))
    if baselines:
        lines.append("logistic regression: "
                     + baselines["logistic_regression"].get("inputs", ""))
        lines.append("ROC area within the month: an event day against a day without one of "
                     "the same month (the season's own share taken out)")
    return lines


def verify_text(summary: dict) -> str:
    """A readable terminal summary of ``AnalogStore.verify``."""
    settings = summary["settings"]
    lines = [
        f"Leave-one-year-out hindcast of P(at least one event in region): "
        f"{summary['n_forecasts']} days, base rate {100 * summary['base_rate']:.1f}%",
        f"settings: {settings['top']} analogs, {settings['n_modes']} EOF modes, window "
        f"+/-{settings['window']} d, months {settings['months'] or 'all'}"
        + (f", metric {settings['metric']}" if settings.get("metric") else "")
        + (f";{narrowed}" if (narrowed := _skill_settings_text(settings)) else ""),
        "",
        *_skill_table(summary),
        "",
        f"yes/no at P >= {settings['threshold']}: " + ", ".join(
            f"{name} {value:.3f}" for name, value in summary["scores"].items()
            if value is not None and name != "ets"),
        "",
        "reliability (forecast mean -> observed frequency, count):",
    ]
    if settings.get("days_forecast"):
        lines.insert(2, f"days forecast: {settings['days_forecast']}")
    if settings.get("n_days_without_reports"):
        lines.insert(2, f"{settings['n_days_without_reports']} days without reports yet left "
                        "out (neither forecast nor used as analogs)")
    for row in summary["reliability"]:
        lines.append(f"  {row['forecast_mean']:.2f} -> {row['observed_frequency']:.2f}  ({row['count']})")
    if "tuning" in summary:
        best = summary["tuning"]["best"]
        lines.append("")
        tuning = summary["tuning"]
        lines.append(f"tuning: best {best['top']} analogs with {best['n_modes']} modes"
                     + (f", metric {tuning['metric']} (the scan measures that metric "
                        "only; the scores above are of it, and --save records it)"
                        if "metric" in tuning else ""))
        if "nested" in tuning:
            ref, nested = tuning["reference"], tuning["nested"]
            lo, hi = nested["brier_skill_score_ci"]
            lines.append(
                f"  scored on folds that did not choose it (nested leave-one-year-out): BSS "
                f"{nested['brier_skill_score']:.3f} [{lo:.3f}, {hi:.3f}]; on the folds that "
                f"chose it: {tuning['non_nested']['brier_skill_score']:.3f}")
            lines.append(
                f"  gain over the current setting ({ref['top']} analogs, {ref['n_modes']} "
                f"modes, BSS {ref['brier_skill_score']:.3f}): nested "
                f"{tuning['nested_gain']:+.3f}, non-nested {tuning['non_nested_gain']:+.3f}")
        for row in summary["tuning"]["table"][:5]:
            lines.append(f"  top {row['top']:>3}  modes {row['n_modes']:>3}  BSS {row['brier_skill_score']:.3f}")
    return _with_caution(lines)


def training_text(training: dict) -> str:
    """What the learned classifier of ``analogs tag --train`` is worth: its accuracy
    cross-validated on the labelled days, and its labels (rows) against the rule
    regimes (columns) over every archive day."""
    accuracy = training.get("accuracy")
    folds = training.get("fold_accuracy") or []
    if accuracy is None or accuracy != accuracy:
        head = (f"learned classifier ({training.get('n_labelled')} labelled days): "
                f"cross-validated accuracy {training.get('method')}")
    else:
        head = (f"learned classifier ({training.get('n_labelled')} labelled days, labels "
                f"{', '.join(training.get('labels', []))}): accuracy {100 * accuracy:.1f}% on "
                f"days it was not trained on ({training.get('method')}; folds "
                + ", ".join(f"{100 * v:.0f}%" for v in folds if v == v) + ")")
    lines = [head]
    table = training.get("against_rules")
    if table is not None and len(table):
        lines.append("learned (rows) against rule regimes (columns), every archive day:")
        lines.append(table.to_string())
    return "\n".join(lines)


def dumps(data, *, indent=2) -> str:
    """JSON text with NaN written as null (strict JSON for scripts). ``data`` is plain
    JSON values or a result object with ``to_dict()`` (a
    :class:`~analogs.results.FindResult`); ``indent=None`` gives one line."""
    if not isinstance(data, (dict, list)) and callable(getattr(data, "to_dict", None)):
        data = data.to_dict()
    return json.dumps(_nan_to_none(data), indent=indent)


def _nan_to_none(value):
    if isinstance(value, float) and (math.isnan(value) or math.isinf(value)):
        return None
    if isinstance(value, dict):
        return {str(k): _nan_to_none(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_nan_to_none(v) for v in value]
    return value


def embed_png(png: bytes, alt: str) -> str:
    """An <img> tag with the PNG bytes embedded as a data URI (no external resource) and
    ``alt`` as its text."""
    return (f'<img alt="{html.escape(alt, quote=True)}" '
            f'src="data:image/png;base64,{base64.b64encode(png).decode()}">')


_STYLE = """
body{font-family:system-ui,sans-serif;margin:2em auto;max-width:70em;color:#222;line-height:1.4}
table{border-collapse:collapse;margin:1em 0}th,td{padding:.25em .6em;border-bottom:1px solid #ddd;text-align:right}
th{background:#f2f2f2}td.l,th.l{text-align:left}.caution{border-left:4px solid #555;padding:.5em 1em;background:#f7f7f7}
img{max-width:100%;height:auto}code{background:#f2f2f2;padding:0 .2em}
"""


def html_page(title: str, sections: list[tuple[str, str]], provenance: dict | None = None) -> str:
    """A self-contained HTML page: inline style, embedded images, no external resource."""
    parts = [
        "<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
        f"<title>{html.escape(title)}</title><style>{_STYLE}</style></head><body>",
        f"<h1>{html.escape(title)}</h1>",
        f'<p class="caution"><strong>Caution.</strong> {html.escape(CAUTION)}</p>',
    ]
    for heading, body in sections:
        parts.append(f"<h2>{html.escape(heading)}</h2>\n{body}")
    if provenance:
        parts.append("<h2>Provenance</h2><pre>" + html.escape(json.dumps(provenance, indent=2))
                     + "</pre>")
    parts.append(f"<p><small>Written by analogs {__version__}.</small></p></body></html>")
    return "\n".join(parts)


def html_table(rows: list[dict], columns: list[str], *, left=()) -> str:
    """An HTML table of ``rows`` (dicts) in ``columns`` order, text escaped; the
    ``left`` columns are left-aligned (text), the others right-aligned (numbers)."""
    head = "".join(f'<th class="{"l" if c in left else ""}">{html.escape(c)}</th>' for c in columns)
    body = []
    for row in rows:
        cells = "".join(f'<td class="{"l" if c in left else ""}">{html.escape(str(row.get(c, "")))}</td>'
                        for c in columns)
        body.append(f"<tr>{cells}</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def find_html(result, manifest: dict, figures: list[tuple[str, str, str]] = (),
              days: dict | None = None) -> str:
    """The page of one query (a :class:`~analogs.results.FindResult` or its
    ``to_dict()``), answer first: P(at least one event) beside the base rate, per kind,
    its measured skill, the target's regime and why; then the evidence to browse (the
    analog table, sortable and filterable, with each day's map and reports: ``days``,
    rank -> {"tile", "alt", "reports"} of :func:`analogs.workflows.page.analog_days`);
    then the ``figures`` (caption, SVG text, alt text), the settings and the store's
    provenance from ``manifest``. Self-contained (see :mod:`analogs.presentation.browse`)."""
    from analogs.presentation import browse
    data = _find_data(result)
    target = data["target"]
    sections = [browse.answer_section(data, skill_line(data["outcomes"].get("skill")))]
    if "members" in data:  # an ensemble: each member's answer before the pooled days
        member_rows = [{"member": m["member"], "regime": m["regime"],
                        "confidence": f"{m['regime_confidence']:.2f}",
                        "P(any event)": _fmt_probability(m["outcomes"]["p_any_event"]) + " "
                        + _fmt_interval(m["outcomes"].get("p_any_event_ci")),
                        "mean events": f"{m['outcomes']['mean_events']:.2f}",
                        "closest days": " ".join(a["date"] for a in m["analogs"][:3])}
                       for m in data["members"]]
        sections.append("<h2>Members</h2>" + html_table(
            member_rows, ["member", "regime", "confidence", "P(any event)", "mean events",
                          "closest days"], left=("regime", "closest days")))
    sections.append(browse.browser_section(data, days))
    sections.append(browse.figures_section(figures))
    provenance = {"archive": manifest.get("archive"), "config": manifest.get("config"),
                  "events": manifest.get("events")}
    sections.append("<h2>Settings</h2>" + browse.settings_table(data["settings"])
                    + "<details><summary>Provenance of the store</summary><pre>"
                    + html.escape(json.dumps(provenance, indent=2)) + "</pre></details>")
    when = target.get("valid_time") or target["date"] or "a forecast field"
    return browse.page(f"Analogs of {when}", CAUTION, sections,
                       f"<p><small>Written by analogs {__version__}.</small></p>")


def valid_times_html(result, manifest: dict, links=()) -> str:
    """The index page of several valid times of one target file: regime and
    P(at least one event) by valid time, each linked to its own page (``links``, one
    relative path per valid time)."""
    data = _find_data(result)
    rows = []
    for i, answer in enumerate(data["valid_times"]):
        target, outcomes = answer["target"], answer["outcomes"]
        when = html.escape(str(target.get("valid_time", target["date"])))
        spread = (outcomes.get("member_spread") or {}).get("p_any_event")
        rows.append({
            "valid time": (f'<a href="{html.escape(links[i], quote=True)}">{when}</a>'
                           if i < len(links) else when),
            "regime": html.escape(f"{target['regime']} ({target['regime_confidence']:.2f})"),
            "P(any event)": _fmt_probability(outcomes["p_any_event"]) + " "
            + _fmt_interval(outcomes.get("p_any_event_ci")),
            "members": (f"{_fmt_spread(spread)}" if spread else ""),
            "season climatology": _fmt_probability(outcomes["climatology_p_any_event"]),
            "closest analog": answer["analogs"][0]["date"] if answer["analogs"] else ""})
    columns = ["valid time", "regime", "P(any event)", "members", "season climatology",
               "closest analog"]
    head = "".join(f"<th>{html.escape(c)}</th>" for c in columns)
    body = "".join("<tr>" + "".join(f"<td>{row[c]}</td>" for c in columns) + "</tr>"
                   for row in rows)  # cells escaped above (the link is markup)
    sections = [("Valid times", f"<table><thead><tr>{head}</tr></thead><tbody>{body}"
                                "</tbody></table>"),
                ("Settings", "<pre>" + html.escape(json.dumps(data["settings"], indent=2))
                 + "</pre>")]
    provenance = {"archive": manifest.get("archive"), "config": manifest.get("config"),
                  "events": manifest.get("events")}
    return html_page(f"Analogs of {len(rows)} valid times", sections, provenance)
