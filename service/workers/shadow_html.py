"""The shadow report as one self-contained HTML page: inline CSS, plots embedded as SVG images,
nothing fetched. The cautions come first, then key figures, tables, plots and definitions.
The page shows counts and rates only: no identifier and no event_id.
"""

from __future__ import annotations

import html
import math

from scoring.evaluate import CatchSplit, ShadowComparison
from service.workers.shadow import ShadowReport, money, share
from service.workers.shadow_plots import (
    alert_rate,
    daily_volumes,
    precision_recall,
    score_distribution,
)

CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,"DejaVu Sans",sans-serif;margin:0;
 background:#f6f7f9;color:#1f2328;line-height:1.45}
main{max-width:1080px;margin:0 auto;padding:24px 28px 48px}
h1{font-size:1.7rem;margin:0 0 4px}h2{font-size:1.25rem;margin:32px 0 8px;
 border-bottom:2px solid #d0d7de;padding-bottom:4px}
.meta{color:#57606a;margin:0 0 16px}
.caution{background:#fff4e5;border:2px solid #d55e00;border-radius:8px;padding:12px 18px;
 margin:16px 0 8px}
.caution h2{border:none;margin:0 0 6px;color:#8a3300;font-size:1.15rem}
.caution li{margin:4px 0}
.cards{display:grid;grid-template-columns:repeat(auto-fit,minmax(150px,1fr));gap:12px}
.card{background:#fff;border:1px solid #d0d7de;border-radius:8px;padding:10px 14px}
.card .k{color:#57606a;font-size:.85rem}.card .v{font-size:1.35rem;font-weight:600}
.card .s{color:#57606a;font-size:.85rem}
table{border-collapse:collapse;background:#fff;margin:8px 0;font-variant-numeric:tabular-nums}
th,td{border:1px solid #d0d7de;padding:5px 10px;text-align:right}
th{background:#eef1f4}td.l,th.l{text-align:left}
tr.pick td{background:#fff4e5;font-weight:600}td.diag{background:#e8f5ee;font-weight:600}
.ours{color:#b34700;font-weight:600}.rules{color:#005a8c;font-weight:600}
.note{color:#57606a;font-size:.9rem;max-width:900px}
figure{background:#fff;border:1px solid #d0d7de;border-radius:8px;margin:12px 0;padding:8px}
figure img{width:100%;max-width:900px;display:block;margin:0 auto}
figcaption{color:#57606a;font-size:.9rem;padding:4px 8px}
dl dt{font-weight:600;margin-top:8px}dl dd{margin-left:16px}
"""

CAUTIONS = (
    "<strong>Keep a human review path for automated denials.</strong> Anyone denied on a score "
    "must be able to reach a person who can look at the case and reverse it.",
    "<strong>Check outcomes across groups of customers for disparate impact before "
    "deploying.</strong> Compare alert, denial and catch rates between groups (for example by "
    "country, language or account age); a score can stop one group's legitimate customers far "
    "more often than another's.",
    "<strong>Follow local law on automated decisions and data protection.</strong> Some places "
    "restrict decisions made solely by automated means and require notice, an explanation or "
    "human involvement (for example Article 22 of the EU GDPR), and limit how long personal data "
    "may be kept.",
)


def _esc(text: object) -> str:
    return html.escape(str(text))


def _table(head: list[str], rows: list[list[str]], classes: list[str] | None = None) -> str:
    cells = "".join(f"<th{' class=l' if i == 0 else ''}>{h}</th>" for i, h in enumerate(head))
    body = []
    for r, row in enumerate(rows):
        extra = f" class={classes[r]}" if classes and classes[r] else ""
        tds = "".join(f"<td{' class=l' if i == 0 else ''}>{v}</td>" for i, v in enumerate(row))
        body.append(f"<tr{extra}>{tds}</tr>")
    return f"<table><tr>{cells}</tr>{''.join(body)}</table>"


def _card(key: str, value: str, sub: str = "") -> str:
    parts = f"<div class=k>{key}</div><div class=v>{value}</div><div class=s>{sub}</div>"
    return f"<div class=card>{parts}</div>"


def _header(report: ShadowReport) -> str:
    labels = report.labels
    if labels is None:
        known = "No labels were given, so catches and precision are not measured."
    else:
        known = (
            f"Labels: {labels.fraud:,} fraud, {labels.not_fraud:,} not fraud, "
            f"{labels.unlabelled:,} events unlabelled (counted as not fraud)."
        )
        if labels.unknown_ids:
            known += f" {labels.unknown_ids:,} labels name events not in the scores (left out)."
    rules = (
        "emberscore's decisions beside the rules in force (current_decision)."
        if report.rules is not None
        else "The scores carry no current_decision, so there are no rules to compare with."
    )
    return (
        f"<h1>{_esc(report.title)}</h1><p class=meta>{report.events:,} events, "
        f"{report.first_day} to {report.last_day} ({report.days} days, UTC). {rules} "
        f"{known} Made {report.generated_at}.</p>"
    )


def _cautions() -> str:
    items = "".join(f"<li>{item}</li>" for item in CAUTIONS)
    return f"<section class=caution><h2>Before acting on this report</h2><ul>{items}</ul></section>"


def _cards(report: ShadowReport) -> str:
    ours, rules, c = report.ours, report.rules, report.comparison
    cards = [_card("Events", f"{report.events:,}", f"over {report.days} days")]
    sub = f"rules: {rules.alerts:,} ({100 * rules.alert_rate:.2f}%)" if rules else ""
    sub = f"{100 * ours.alert_rate:.2f}% of events" + (f"; {sub}" if sub else "")
    cards.append(_card("emberscore alerts", f"{ours.alerts:,}", sub))
    if c is not None:
        cards.append(_card("Same decision", f"{100 * c.agreement_rate:.1f}%", "of events"))
    if c is not None and report.labels is not None and c.by_decision.fraud:
        cards += _fraud_cards(c)
    return f"<div class=cards>{''.join(cards)}</div>"


def _fraud_cards(c: ShadowComparison) -> list[str]:
    d, s = c.by_decision, c.same_volume
    caught = f"{share(d.ours, d.fraud)} of {d.fraud:,} labelled; rules {d.rules:,} "
    cards = [
        _card("Fraud caught by emberscore", f"{d.ours:,}", caught + f"({share(d.rules, d.fraud)})"),
        _card(
            "At the rules' alert volume", f"{s.ours:,}", f"caught; {s.only_ours:,} the rules miss"
        ),
    ]
    if d.amount is not None:
        rules = f"of {money(d.amount.fraud)}; rules {money(d.amount.rules)}"
        cards.append(_card("Fraud amount caught", money(d.amount.ours), rules))
    return cards


def _agreement_table(c: ShadowComparison) -> str:
    names = ("allow", "review", "deny")
    head = "".join(f"<th>rules <b>{n}</b></th>" for n in names)
    rows = [f"<tr><th class=l></th>{head}<th>all</th></tr>"]
    for i, name in enumerate(names):
        cells = "".join(
            f"<td{' class=diag' if i == j else ''}>{c.agreement[i, j]:,} "
            f"({share(c.agreement[i, j], c.events)})</td>"
            for j in range(3)
        )
        total = f"<td>{c.agreement[i].sum():,}</td>"
        rows.append(f"<tr><td class=l>emberscore <b>{name}</b></td>{cells}{total}</tr>")
    totals = "".join(f"<td>{c.agreement[:, j].sum():,}</td>" for j in range(3))
    rows.append(f"<tr><td class=l>all</td>{totals}<td>{c.events:,}</td></tr>")
    return f"<table>{''.join(rows)}</table>"


def _agreement(report: ShadowReport) -> str:
    c = report.comparison
    if c is None:
        return ""
    left = ""
    if c.excluded:
        left = f" {c.excluded:,} events without a readable decision on one side are left out."
    return (
        "<h2>Decisions side by side</h2><p class=note>Each cell counts events by emberscore's "
        "decision (row) and the rules' (column), with its share of all events; the shaded "
        f"diagonal is where both agree.{left}</p>{_agreement_table(c)}"
    )


def _volumes(report: ShadowReport) -> str:
    sides = [("emberscore", report.ours)] + ([("rules", report.rules)] if report.rules else [])
    rows = [
        ["review", *(f"{v.review:,}" for _, v in sides)],
        ["deny", *(f"{v.deny:,}" for _, v in sides)],
        ["alerts (review or deny)", *(f"{v.alerts:,}" for _, v in sides)],
        ["alert rate", *(f"{100 * v.alert_rate:.2f}%" for _, v in sides)],
        ["alerts per day: mean", *(f"{v.mean_per_day:,.1f}" for _, v in sides)],
        ["alerts per day: 90th percentile", *(f"{v.p90_per_day:,.1f}" for _, v in sides)],
        ["alerts per day: busiest day", *(f"{v.max_per_day:,}" for _, v in sides)],
    ]
    return "<h2>Alert volumes</h2>" + _table(["", *(name for name, _ in sides)], rows)


def _split_rows(split: CatchSplit) -> list[tuple[str, int, float | None]]:
    a = split.amount
    return [
        ("alerted by emberscore", split.ours, a.ours if a else None),
        ("alerted by the rules", split.rules, a.rules if a else None),
        ("alerted by both", split.both, a.both if a else None),
        ("only emberscore alerts (emberscore adds)", split.only_ours, a.only_ours if a else None),
        ("only the rules alert (emberscore misses)", split.only_rules, a.only_rules if a else None),
        ("missed by both", split.neither, a.neither if a else None),
        ("all labelled fraud", split.fraud, a.fraud if a else None),
    ]


def _catches(report: ShadowReport) -> str:
    c = report.comparison
    if c is None or report.labels is None:
        why = "no labels were given" if report.labels is None else "there are no rules to compare"
        return f"<h2>Labelled fraud: who catches what</h2><p class=note>Not shown: {why}.</p>"
    has_amount = c.by_decision.amount is not None
    head = ["labelled fraud", "events", "share of fraud"] + (["amount"] if has_amount else [])
    head += ["events", "share of fraud"] + (["amount"] if has_amount else [])
    rows = []
    for (label, n, amount), (_, m, amount_same) in zip(
        _split_rows(c.by_decision), _split_rows(c.same_volume), strict=True
    ):
        row = [label, f"{n:,}", share(n, c.by_decision.fraud)]
        row += [money(amount or 0.0)] if has_amount else []
        row += [f"{m:,}", share(m, c.same_volume.fraud)]
        rows.append(row + ([money(amount_same or 0.0)] if has_amount else []))
    groups = 3 if has_amount else 2
    top = (
        f"<tr><th class=l></th><th colspan={groups}>as decided (review or deny)</th>"
        f"<th colspan={groups}>emberscore at the rules' volume</th></tr>"
    )
    table = _table(head, rows).replace("<table>", f"<table>{top}", 1)
    note = (
        f"Left: each side's own decisions. Right: emberscore alerting its "
        f"{c.same_volume_alerts:,} highest-risk events (risk >= {c.same_volume_threshold:.4f}), "
        f"as many as the rules alert ({c.alerts_rules:,}), against the rules as decided."
    )
    if has_amount and c.by_decision.amount and c.by_decision.amount.fraud_without_amount:
        note += f" {c.by_decision.amount.fraud_without_amount:,} fraud events have no amount (0)."
    return f"<h2>Labelled fraud: who catches what</h2><p class=note>{note}</p>{table}"


def _capacity(report: ShadowReport) -> str:
    with_labels = report.labels is not None
    head = [
        "review capacity per day",
        "threshold (alert risk >=)",
        "alerts in period",
        "alert rate",
        "per day: mean",
        "per day: p90",
        "busiest day",
    ]
    head += ["recall", "precision"] if with_labels else []
    rows, classes = [], []
    for row in report.capacity:
        where = "none fits" if math.isinf(row.threshold) else f"{row.threshold:.4f}"
        cells = [
            f"{row.per_day:,.0f}",
            where,
            f"{row.alerts:,}",
            f"{100 * row.alert_rate:.2f}%",
            f"{row.mean_per_day:,.1f}",
            f"{row.p90_per_day:,.1f}",
            f"{row.max_per_day:,}",
        ]
        cells += [share(row.recall, 1.0), share(row.precision, 1.0)] if with_labels else []
        rows.append(cells)
        classes.append("pick" if row.per_day == report.capacity_per_day else "")
    given = (
        ""
        if report.capacity_per_day is None
        else f" The highlighted row is the capacity given ({report.capacity_per_day:,.0f} per day)."
    )
    note = (
        "The lowest emberscore threshold whose 90th-percentile daily alert volume fits each "
        "review capacity, so the queue overflows on about one day in ten." + given
    )
    table = _table(head, rows, classes)
    return f"<h2>Threshold for a review capacity</h2><p class=note>{note}</p>{table}"


def _figure_html(uri: str, alt: str, caption: str) -> str:
    return f"<figure><img src='{uri}' alt='{_esc(alt)}'><figcaption>{caption}</figcaption></figure>"


def _plots(report: ShadowReport) -> str:
    p, c = report.plots, report.comparison
    parts = ["<h2>Plots</h2>"]
    parts.append(
        _figure_html(
            score_distribution(p),
            "risk distribution by outcome",
            "How emberscore's risk is spread within each outcome group. A useful score puts fraud "
            "to the right of everything else. Each line sums to 100% of its group.",
        )
    )
    if p.pr_ours is not None:
        parts.append(
            _figure_html(
                precision_recall(p),
                "precision against recall",
                "Moving right alerts more events: more fraud is caught (recall) but fewer "
                "alerts are fraud (precision). Dots: each side's own review-or-deny decisions. "
                "Higher and further right is better. Unlabelled events count as not fraud.",
            )
        )
    rules_rate = report.rules.alert_rate if report.rules is not None else None
    same = c.same_volume_threshold if c is not None else None
    parts.append(
        _figure_html(
            alert_rate(p, rules_rate, same),
            "alert rate against threshold",
            "Read off how many events a threshold would alert. Where the orange line crosses the "
            "dashed blue one, emberscore alerts as many events as the rules do.",
        )
    )
    parts.append(
        _figure_html(
            daily_volumes(p, report.capacity_per_day),
            "daily alert volume",
            "Alerts per UTC day on each side: the load a review team would see.",
        )
    )
    return "".join(parts)


DEFINITIONS = (
    ("Alert", "A decision of review or deny."),
    ("Caught, missed", "A labelled fraud event that a side alerted, or allowed."),
    (
        "Unlabelled events",
        "Count as not fraud in every catch and precision figure (common "
        "practice): precision here is a lower bound while labels are still arriving.",
    ),
    (
        "Rules as a ranking",
        "For the rules' precision-recall curve and AP, their decisions rank "
        "events deny > review > allow; each level is one tied block, so their curve has three "
        "steps.",
    ),
    (
        "AP",
        "Average precision: the sum, over thresholds, of the gain in recall times the "
        "precision there (step-wise, no interpolation).",
    ),
    (
        "Same volume",
        "emberscore alerting as many of its highest-risk events as the rules alert, "
        "so that catches compare at equal review work. Ties at the cut are all included.",
    ),
    ("Days", "UTC calendar days; a day without events counts as a day without alerts."),
)


def _definitions() -> str:
    items = "".join(f"<dt>{term}</dt><dd>{text}</dd>" for term, text in DEFINITIONS)
    return f"<h2>How these figures are computed</h2><dl class=note>{items}</dl>"


def render_page(report: ShadowReport) -> str:
    """The whole report as one HTML page: inline CSS, plots embedded, nothing fetched."""
    body = "".join(
        [
            _header(report),
            _cautions(),
            _cards(report),
            _agreement(report),
            _volumes(report),
            _catches(report),
            _capacity(report),
            _plots(report),
            _definitions(),
        ]
    )
    return (
        "<!DOCTYPE html><html lang=en><head><meta charset=utf-8>"
        "<meta name=viewport content='width=device-width, initial-scale=1'>"
        f"<title>{_esc(report.title)}</title><style>{CSS}</style></head>"
        f"<body><main>{body}</main></body></html>\n"
    )
