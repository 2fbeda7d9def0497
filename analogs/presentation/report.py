"""Presentation of results: terminal tables, JSON and self-contained HTML pages.

Nothing here computes statistics; it only lays out what the other stages return.
"""

from __future__ import annotations

import base64
import html
import json
import math

from analogs import CAUTION, __version__


def _fmt_probability(value) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "  n/a"
    return f"{100.0 * value:5.1f}%"


def _fmt_interval(interval) -> str:
    if not interval:
        return ""
    lo, hi = interval
    return f"[{100.0 * lo:.0f}-{100.0 * hi:.0f}%]"


def skill_line(skill) -> str:
    """One line on what this query's guidance has been worth (cross-validated), or ''."""
    if not skill:
        return ""
    if skill.get("measured") is False:
        return ("Worth in the past: not measured for this region"
                + (" and these kinds" if skill.get("kinds") else "")
                + f"; measure it with: {skill['command']}")
    lo, hi = skill["brier_skill_score_ci"]
    text = (f"Worth in the past (leave-one-year-out, store region, any kind): Brier skill "
            f"score {skill['brier_skill_score']:.2f} [{lo:.2f}, {hi:.2f}] vs season "
            f"climatology, ROC area {skill['roc_auc']:.2f}")
    if skill.get("base_rate") is not None:
        text += f", base rate {100 * skill['base_rate']:.0f}%"
    if skill.get("month_brier_skill_score") is not None:
        text += f"; in month {skill['month']}: {skill['month_brier_skill_score']:.2f}"
        if skill.get("month_base_rate") is not None:
            text += f", base rate {100 * skill['month_base_rate']:.0f}%"
    return text


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
                 f"{settings['n_modes']} EOF modes")
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
    lines.append("")
    lines.append(CAUTION)
    return "\n".join(lines)


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
    lines.append("")
    lines.append(CAUTION)
    return "\n".join(lines)


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
    lines.append("")
    lines.append(CAUTION)
    return "\n".join(lines)


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
        f"+/-{settings['window']} d, months {settings['months'] or 'all'}",
        "",
        *_skill_table(summary),
        "",
        f"yes/no at P >= {settings['threshold']}: " + ", ".join(
            f"{name} {value:.3f}" for name, value in summary["scores"].items()
            if value is not None and name != "ets"),
        "",
        "reliability (forecast mean -> observed frequency, count):",
    ]
    if settings.get("n_days_without_reports"):
        lines.insert(2, f"{settings['n_days_without_reports']} days without reports yet left "
                        "out (neither forecast nor used as analogs)")
    for row in summary["reliability"]:
        lines.append(f"  {row['forecast_mean']:.2f} -> {row['observed_frequency']:.2f}  ({row['count']})")
    if "tuning" in summary:
        best = summary["tuning"]["best"]
        lines.append("")
        lines.append(f"tuning: best {best['top']} analogs with {best['n_modes']} modes")
        tuning = summary["tuning"]
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
    lines.append("")
    lines.append(CAUTION)
    return "\n".join(lines)


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


def find_html(result, manifest: dict, figures: list[tuple[str, bytes]] = ()) -> str:
    """The HTML page of one query (a :class:`~analogs.results.FindResult` or its
    ``to_dict()``): target, analog table, outcomes, figures as (caption, PNG bytes)
    embedded, settings and the store's provenance from ``manifest``."""
    data = _find_data(result)
    target, outcomes = data["target"], data["outcomes"]
    kinds = sorted({k for a in data["analogs"] for k in a["events"]["by_kind"]})
    rows = []
    for analog in data["analogs"]:
        row = {"rank": analog["rank"], "date": analog["date"],
               "distance": f"{analog['distance']:.2f}", "regime": analog["regime"],
               "events": analog["events"]["total"]}
        row.update({k: analog["events"]["by_kind"].get(k, 0) for k in kinds})
        if row["events"] is None:  # a day without report coverage (issue 13)
            row.update({"events": "no reports yet", **{k: "" for k in kinds}})
        rows.append(row)
    sections = [
        ("Target", f"<p>{html.escape(str(target['date'] or 'forecast field'))}: regime "
                   f"<strong>{html.escape(target['regime'])}</strong> (confidence "
                   f"{target['regime_confidence']:.2f}). {html.escape(target.get('reason', ''))}</p>"),
        ("Closest past days", html_table(rows, ["rank", "date", "distance", "regime", "events", *kinds],
                                         left=("date", "regime"))),
    ]
    if "members" in data:  # an ensemble: the consensus days above, each member here
        sections[0] = ("Target", f"<p>{html.escape(str(target['date']))}, ensemble of "
                       f"{len(data['members'])} members: regime <strong>"
                       f"{html.escape(target['regime'])}</strong> in "
                       f"{100 * target['regime_confidence']:.0f}% of members "
                       f"({html.escape(_regime_shares(target))}).</p>")
        sections[1] = ("Closest past days chosen by the members (most chosen first)",
                       html_table([{**row, "members": analog.get("n_members", "")}
                                   for row, analog in zip(rows, data["analogs"])],
                                  ["rank", "date", "members", "distance", "regime", "events",
                                   *kinds], left=("date", "regime")))
        member_rows = [{"member": m["member"], "regime": m["regime"],
                        "confidence": f"{m['regime_confidence']:.2f}",
                        "P(any event)": _fmt_probability(m["outcomes"]["p_any_event"]) + " "
                        + _fmt_interval(m["outcomes"].get("p_any_event_ci")),
                        "mean events": f"{m['outcomes']['mean_events']:.2f}",
                        "closest days": " ".join(a["date"] for a in m["analogs"][:3])}
                       for m in data["members"]]
        sections.insert(1, ("Members", html_table(
            member_rows, ["member", "regime", "confidence", "P(any event)", "mean events",
                          "closest days"], left=("regime", "closest days"))))
    if outcomes.get("has_events", True):
        outcome_rows = [{"statistic": "P(at least one event in region)",
                         "analogs": _fmt_probability(outcomes["p_any_event"]) + " "
                         + _fmt_interval(outcomes.get("p_any_event_ci")),
                         "season climatology": _fmt_probability(outcomes["climatology_p_any_event"])},
                        {"statistic": "mean events per day", "analogs": f"{outcomes['mean_events']:.2f}",
                         "season climatology": ""}]
        for kind, stats in sorted(outcomes.get("by_kind", {}).items()):
            outcome_rows.append({"statistic": f"P(any {kind})", "analogs": _fmt_probability(stats["p_any"]),
                                 "season climatology": _fmt_probability(stats.get("climatology_p_any"))})
        unknown = outcomes.get("n_analogs_without_reports", 0)  # issue 13
        sections.append(("What these days produced",
                         (f"<p>{unknown} of the {outcomes['n_analogs'] + unknown} analogs have "
                          "no reports yet (days the events table does not cover): the "
                          f"statistics count the {outcomes['n_analogs']} with reports.</p>"
                          if unknown else "")
                         + html_table(outcome_rows, ["statistic", "analogs", "season climatology"],
                                      left=("statistic",))
                         + f"<p>{html.escape(skill_line(outcomes.get('skill')))}</p>"))
    for caption, png, *alt in figures:  # (caption, PNG bytes[, alt text])
        sections.append((caption, embed_png(png, alt[0] if alt else caption)))
    sections.append(("Settings", "<pre>" + html.escape(json.dumps(data["settings"], indent=2)) + "</pre>"))
    provenance = {"archive": manifest.get("archive"), "config": manifest.get("config"),
                  "events": manifest.get("events")}
    return html_page("Analogs of " + str(target["date"] or "a forecast field"), sections, provenance)


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


def html_frame(frame, *, left=(), digits=3) -> str:
    """An HTML table of a DataFrame (index dropped; floats to ``digits`` significant
    figures, dates as YYYY-MM-DD, NaN as "n/a")."""
    def cell(value):
        if isinstance(value, float):
            return "n/a" if math.isnan(value) else f"{value:.{digits}g}"
        if hasattr(value, "strftime"):
            return value.strftime("%Y-%m-%d")
        return value

    columns = [str(c) for c in frame.columns]
    rows = [{c: cell(v) for c, v in zip(columns, values)}
            for values in frame.itertuples(index=False, name=None)]
    return html_table(rows, columns, left=left)


def _skill_section(skill) -> str:
    if not skill:
        return ("<p>No cross-validated skill in this store (it was built without events "
                "or from fewer than two years).</p>")
    lo, hi = skill.get("brier_skill_score_ci") or (float("nan"), float("nan"))
    lines = [f"<p>{html.escape(skill.get('method', 'hindcast'))}, {skill.get('top')} analogs, "
             f"season window +/-{skill.get('window_days')} d: Brier skill score "
             f"<strong>{skill.get('brier_skill_score', float('nan')):.3f}</strong> "
             f"(year-bootstrap interval {lo:.3f} to {hi:.3f}), ROC area "
             f"{skill.get('roc_auc', float('nan')):.3f}. A Brier skill score above 0 means the "
             "analogs beat the season's climatology.</p>"]
    rows = [{"month": month, "days": entry["n_days"],
             "base rate": _fmt_probability(entry["base_rate"]),
             "Brier score": f"{entry['brier_score']:.4f}",
             "Brier skill score": "n/a" if entry["brier_skill_score"] is None
             else f"{entry['brier_skill_score']:.3f}"}
            for month, entry in sorted((skill.get("by_month") or {}).items(),
                                       key=lambda item: int(item[0]))]
    if rows:
        lines.append(html_table(rows, ["month", "days", "base rate", "Brier score",
                                       "Brier skill score"]))
    return "\n".join(lines)


def _readable(name: str, frame):
    """The columns of a briefing table a reader needs, with plain headings."""
    if name == "regime_trend":
        # The archive's sampling unit: days, or samples for an archive of means.
        unit = "samples" if "slope_samples_per_decade" in frame else "days"
        return frame.assign(
            slope=[f"{v:+.1f} +/- {e:.1f}" if v == v else "n/a" for v, e in
                   zip(frame[f"slope_{unit}_per_decade"],
                       frame[f"slope_stderr_{unit}_per_decade"])],
        )[["regime", "n_years", f"mean_{unit}_per_season", "slope", "p_value", "kendall_tau",
           "kendall_p_value"]].rename(columns={
               "n_years": "years", f"mean_{unit}_per_season": f"mean {unit} per season",
               "slope": f"slope ({unit}/decade)", "p_value": "p (least squares)",
               "kendall_tau": "Kendall tau", "kendall_p_value": "p (Kendall)"})
    if name == "outcomes_by_regime_and_month":
        kinds = [c[len("mean_"):] for c in frame.columns
                 if c.startswith("mean_") and c != "mean_events"]
        shown = frame[["regime", "month", "n_days"]].rename(columns={"n_days": "days"})
        shown["P(at least one event)"] = [
            f"{_fmt_probability(p).strip()} {_fmt_interval((lo, hi))}" for p, lo, hi in
            zip(frame["p_any_event"], frame["p_any_event_low"], frame["p_any_event_high"])]
        shown["mean events"] = frame["mean_events"]
        for kind in kinds:
            shown[f"mean {kind}"] = frame[f"mean_{kind}"]
        return shown
    return frame


def briefing_html(tables: dict, figures, manifest: dict, settings: dict) -> str:
    """The HTML page of the trainer's seasonal briefing (``analogs climatology``).

    ``tables``: name -> DataFrame of :mod:`analogs.stages.seasonal`, as gathered by
    :func:`analogs.workflows.briefing.build_briefing` (``regime_frequency_by_month``,
    ``regime_trend``, ``regime_persistence``, ``typical_days``, optionally
    ``outcomes_by_regime_and_month``); ``figures``: list of (caption, PNG bytes),
    embedded; ``settings``: what was asked for. Returns the page's text.
    """
    sections = [("Season and settings",
                 f"<p>{html.escape(str(settings.get('season', '')))}: "
                 f"{settings.get('days_tagged', '')} tagged days.</p><pre>"
                 + html.escape(json.dumps(settings, indent=2)) + "</pre>")]
    frequency = tables.get("regime_frequency_by_month")
    unit = "samples" if frequency is not None and "samples" in frequency else "days"
    if frequency is not None and len(frequency):
        wide = frequency.pivot(index="month", columns="regime", values=unit)
        wide = wide[[c for c in frequency["regime"].drop_duplicates()]]
        shares = frequency.pivot(index="month", columns="regime", values="fraction")
        rows = []
        for month in wide.index:
            row = {"month": int(month), f"{unit} tagged": int(wide.loc[month].sum())}
            row.update({regime: f"{int(wide.loc[month, regime])} "
                                f"({100 * shares.loc[month, regime]:.0f}%)"
                        for regime in wide.columns})
            rows.append(row)
        sections.append((f"{unit.capitalize()} in each regime by month (share of the "
                         f"month's tagged {unit})",
                         html_table(rows, ["month", f"{unit} tagged", *wide.columns])))
    described = (
        ("regime_trend", f"Change over the years ({unit} per season per decade)",
         "Least-squares slope of the yearly share with its t-test p-value, and Kendall's "
         "tau (Mann-Kendall test) with its p-value; p below 0.05 is conventionally called "
         "significant, but with few years neither test has much power."),
        ("regime_persistence", "How long each regime lasts (run length, days)",
         "Runs of consecutive tagged days; a missing day or the season's end ends a run."),
        ("outcomes_by_regime_and_month", "What each regime brings, by month",
         "Share of days with at least one event in the region (with its Clopper-Pearson "
         "interval) and mean number of events per day, by kind."),
        ("typical_days", "Example days of each regime",
         "The most confident days of each regime, at least a week apart."),
    )
    for name, heading, note in described:
        frame = tables.get(name)
        if frame is None:
            continue
        note = frame.attrs.get("note", note)  # e.g. no run lengths on seasonal means
        frame = _readable(name, frame)
        sections.append((heading, f"<p>{html.escape(note)}</p><div style=\"overflow-x:auto\">"
                         + html_frame(frame, left=("regime", "reason", "date")) + "</div>"))
    for caption, png, *alt in figures:  # (caption, PNG bytes[, alt text])
        sections.append((caption, embed_png(png, alt[0] if alt else caption)))
    sections.append(("Cross-validated skill of this store", _skill_section(manifest.get("skill"))))
    provenance = {"archive": manifest.get("archive"), "config": manifest.get("config"),
                  "events": manifest.get("events")}
    return html_page("Seasonal regime briefing, " + str(settings.get("season", "")), sections,
                     provenance)
