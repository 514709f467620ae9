"""The demo's summary table (text) and its report page (one HTML file, inline SVG, no scripts).

Both are pure functions of a :class:`ops.lab.demo.DemoResult`.  The page has no
external assets and no JavaScript: it opens from disk anywhere, and a
headless browser can screenshot it.  It never shows comment text or authors
beyond the demo's own invented ones, and only in aggregate.
"""
from __future__ import annotations

import html
import math
from datetime import datetime, timezone

from model.actions import THRESHOLD_ACTIONS, Action
from ops.lab.demo import DemoResult

WIDTH, HEIGHT = 960, 300
PAD_L, PAD_R, PAD_T, PAD_B = 56, 20, 20, 40
COLOURS = {"flagged": "#c0392b", "wave": "#2c7fb8", "ham": "#4d9221", "spam": "#7b3294", "grid": "#dddddd",
           "band": "#fde0c5", "alarm": "#e6550d", "retrain": "#31a354", "text": "#222222"}


def _pct(x) -> str:
    return "n/a" if x is None else f"{100 * x:.1f}%"


def _clock(ts: float) -> str:
    return datetime.fromtimestamp(ts, tz=timezone.utc).strftime("%H:%M")


def _delay(seconds) -> str:
    return "not detected" if seconds is None else f"{seconds / 60:.1f} min"


def summary_rows(result: DemoResult) -> list[tuple[str, str, str]]:
    """(figure, before the retrain, after it) rows of the summary table."""
    f = result.figures()
    b, a = f["before"], f["after"]
    return [
        ("comments scored", f"{b['comments']:,}", f"{a['comments']:,}"),
        ("spam-wave comments", f"{b['wave']:,}", f"{a['wave']:,}"),
        ("wave recall (held or rejected)", _pct(b["wave_recall"]), _pct(a["wave_recall"])),
        ("  by the model alone", _pct(b["wave_model_recall"]), _pct(a["wave_model_recall"])),
        ("background spam recall", _pct(b["spam_recall"]), _pct(a["spam_recall"])),
        ("false-positive rate (ham held or rejected)", _pct(b["false_positive_rate"]), _pct(a["false_positive_rate"])),
        ("ham rejected outright", _pct(b["ham_rejected"]), _pct(a["ham_rejected"])),
    ]


def summary_text(result: DemoResult, *, backend: str) -> str:
    """The table printed at the end of ``seawall demo``."""
    f = result.figures()
    rows = summary_rows(result)
    width = max(len(r[0]) for r in rows) + 2
    lines = [f"{'':<{width}}{'before retrain':>16}{'after retrain':>16}"]
    lines += [f"{name:<{width}}{before:>16}{after:>16}" for name, before, after in rows]
    actions = f["actions"]
    delays = f["detection_delay_s"]
    report = result.retrain_report
    lines += [
        "",
        f"actions: {actions.get(Action.PUBLISH, 0):,} published, {actions.get(Action.HOLD, 0):,} held, "
        f"{actions.get(Action.REJECT, 0):,} rejected of {f['comments']:,} comments "
        f"({f['kinds'].get('ham', 0):,} ham, {f['kinds'].get('spam', 0):,} background spam, "
        f"{f['kinds'].get('wave', 0):,} wave)",
        f"detection delay after the wave began: campaign {_delay(delays['campaign_start'])}, "
        f"flagged-rate wave {_delay(delays['wave_start'])}",
        f"nightly retrain: {report.get('decision', 'not run')}"
        + (f", {result.first_model} -> {result.retrained_model}" if result.retrained_model else "")
        + f"; {sum(result.labels_sent.values())} moderator labels sent",
        f"throughput: {f['throughput']:,.0f} comments/s through the workers on {backend}, in batches of one "
        f"simulated minute (~{_mean_batch(result):.0f} comments; `seawall bench stream` measures capacity); "
        f"whole demo {result.wall_seconds:.1f}s",
    ]
    return "\n".join(lines)


def _mean_batch(result: DemoResult) -> float:
    batches = sum(result.batches.values())
    return len(result.verdicts) / batches if batches else 0.0


# -- SVG ------------------------------------------------------------------------------------------

def _axes(x0: float, x1: float, y1: float, *, y_label: str, x_ticks: list[tuple[float, str]],
          y_ticks: list[tuple[float, str]], width=WIDTH, height=HEIGHT) -> tuple[list[str], callable, callable]:
    pw, ph = width - PAD_L - PAD_R, height - PAD_T - PAD_B

    def sx(x):
        return PAD_L + (x - x0) / (x1 - x0 or 1) * pw

    def sy(y):
        return PAD_T + ph - y / (y1 or 1) * ph

    out = [f'<rect x="{PAD_L}" y="{PAD_T}" width="{pw}" height="{ph}" fill="white" stroke="#999"/>']
    for y, label in y_ticks:
        out.append(f'<line x1="{PAD_L}" x2="{PAD_L + pw}" y1="{sy(y):.1f}" y2="{sy(y):.1f}" stroke="{COLOURS["grid"]}"/>')
        out.append(f'<text x="{PAD_L - 6}" y="{sy(y) + 4:.1f}" text-anchor="end" font-size="11">{html.escape(label)}</text>')
    for x, label in x_ticks:
        out.append(f'<text x="{sx(x):.1f}" y="{PAD_T + ph + 16}" text-anchor="middle" font-size="11">{html.escape(label)}</text>')
    out.append(f'<text x="14" y="{PAD_T + ph / 2:.1f}" transform="rotate(-90 14 {PAD_T + ph / 2:.1f})" '
               f'text-anchor="middle" font-size="12">{html.escape(y_label)}</text>')
    return out, sx, sy


def _svg(body: list[str], *, title: str, width=WIDTH, height=HEIGHT) -> str:
    return (f'<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height}" '
            f'viewBox="0 0 {width} {height}" role="img" aria-label="{html.escape(title)}" '
            f'font-family="sans-serif">{"".join(body)}</svg>')


def flagged_rate_svg(result: DemoResult) -> str:
    """Per-minute share of comments held or rejected, and the wave's share of the traffic."""
    rows = result.per_minute()
    start = result.scenario.start_ts
    n = len(rows)
    ticks = [(m, _clock(start + m * 60)) for m in range(0, n + 1, 10)]
    body, sx, sy = _axes(0, n, 1.0, y_label="share of comments per minute",
                         x_ticks=ticks, y_ticks=[(v / 4, f"{25 * v}%") for v in range(5)])
    w0 = (result.wave_start_ts - start) / 60
    w1 = (result.wave_end_ts - start) / 60
    body.insert(1, f'<rect x="{sx(w0):.1f}" y="{PAD_T}" width="{sx(w1) - sx(w0):.1f}" '
                   f'height="{HEIGHT - PAD_T - PAD_B}" fill="{COLOURS["band"]}" opacity="0.6"/>')
    body.append(f'<text x="{sx(w0) + 4:.1f}" y="{PAD_T + 14}" font-size="11" fill="#a63603">spam wave</text>')

    def line(key, colour, dash=""):
        pts = [(r["minute"] + 0.5, (r.get(key, 0) / r["total"]) if r.get("total") else 0.0) for r in rows]
        path = " ".join(f"{sx(x):.1f},{sy(y):.1f}" for x, y in pts)
        extra = f' stroke-dasharray="{dash}"' if dash else ""
        return f'<polyline points="{path}" fill="none" stroke="{colour}" stroke-width="2"{extra}/>'

    body.append(line("wave", COLOURS["wave"], "5,3"))
    body.append(line("flagged", COLOURS["flagged"]))
    for event, label in _markers(result):
        x = sx((event - start) / 60)
        colour = COLOURS["retrain"] if label.startswith("retrain") else COLOURS["alarm"]
        body.append(f'<line x1="{x:.1f}" x2="{x:.1f}" y1="{PAD_T}" y2="{HEIGHT - PAD_B}" stroke="{colour}" '
                    f'stroke-width="2" stroke-dasharray="2,2"/>')
    y = PAD_T + 30
    for event, label in _markers(result):
        x = sx((event - start) / 60)
        colour = COLOURS["retrain"] if label.startswith("retrain") else COLOURS["alarm"]
        body.append(f'<text x="{x + 4:.1f}" y="{y}" font-size="11" fill="{colour}">{html.escape(label)}</text>')
        y += 14
    body += _legend([("held or rejected", COLOURS["flagged"], ""), ("wave comments (truth)", COLOURS["wave"], "5,3")])
    return _svg(body, title="flagged rate over time")


def _markers(result: DemoResult) -> list[tuple[float, str]]:
    out = []
    campaign = result.first_event("campaign_start")
    if campaign:
        out.append((campaign["ts"], f"campaign alarm {_clock(campaign['ts'])}"))
    wave = result.first_event("wave_start")
    if wave:
        ts = (wave["data"].get("minute", wave["ts"] // 60) + 1) * 60.0
        out.append((ts, f"wave alarm {_clock(ts)}"))
    if result.retrain_ts:
        out.append((result.retrain_ts, f"retrain + hot reload {_clock(result.retrain_ts)}"))
    return out


def _legend(items: list[tuple[str, str, str]]) -> list[str]:
    out = []
    x = PAD_L + 10
    y = HEIGHT - 8
    for label, colour, dash in items:
        extra = f' stroke-dasharray="{dash}"' if dash else ""
        out.append(f'<line x1="{x}" x2="{x + 24}" y1="{y - 4}" y2="{y - 4}" stroke="{colour}" stroke-width="3"{extra}/>')
        out.append(f'<text x="{x + 30}" y="{y}" font-size="12">{html.escape(label)}</text>')
        x += 40 + 7 * len(label)
    return out


SCORE_FLOOR = 1e-4  # verdict scores carry 4 decimals: 0.0000 is "below 0.0001"
SCORE_TICKS = (0.0001, 0.001, 0.01, 0.1, 0.5, 0.9, 0.99, 0.999, 0.9999)


def _logit(p: float) -> float:
    p = min(1 - SCORE_FLOOR, max(SCORE_FLOOR, p))
    return math.log(p / (1 - p))


def score_histogram_svg(result: DemoResult, phase: str, *, bins: int = 36) -> str:
    """Score distribution of ham, background spam and the wave for one phase, on a logit axis, with thresholds.

    Scores near 0 and near 1 are where the decisions are, so the axis is the
    log-odds of the score; the serving model's hold and reject thresholds are
    marked.
    """
    groups = {"ham": [], "spam": [], "wave": []}
    models = set()
    for v in result.verdicts:
        if result.phase(v) == phase:
            groups[v.comment.kind].append(v.score)
            models.add(v.model)
    width, height = WIDTH // 2 - 10, HEIGHT
    lo, hi = _logit(0.0), _logit(1.0)
    counts = {}
    for kind, scores in groups.items():
        c = [0] * bins
        for score in scores:
            c[min(bins - 1, int((_logit(score) - lo) / (hi - lo) * bins))] += 1
        counts[kind] = c
    top = max([1] + [max(c) for c in counts.values()])
    ymax = math.log10(1 + top)
    ticks = [(math.log10(1 + c), f"{c:,}") for c in (0, 1, 10, 100, 1000, 10000) if c <= top * 1.01]
    x_ticks = [(_logit(t), f"{t:g}") for t in SCORE_TICKS]
    body, sx, sy = _axes(lo, hi, ymax, y_label="comments (log scale)", width=width, height=height,
                         x_ticks=x_ticks, y_ticks=ticks)
    colours = {"ham": COLOURS["ham"], "spam": COLOURS["spam"], "wave": COLOURS["wave"]}
    step = (hi - lo) / bins
    for kind, c in counts.items():
        pts = []
        for i, n in enumerate(c):
            y = sy(math.log10(1 + n))
            pts += [f"{sx(lo + i * step):.1f},{y:.1f}", f"{sx(lo + (i + 1) * step):.1f},{y:.1f}"]
        body.append(f'<polyline points="{" ".join(pts)}" fill="none" stroke="{colours[kind]}" stroke-width="2"/>')
    for model in sorted(models):
        th = result.thresholds.get(model)
        if not th:
            continue
        for k, name in enumerate(THRESHOLD_ACTIONS):
            x = sx(_logit(getattr(th, name)))
            body.append(f'<line x1="{x:.1f}" x2="{x:.1f}" y1="{PAD_T}" y2="{height - PAD_B}" stroke="#555" '
                        f'stroke-dasharray="4,3"/>')
            body.append(f'<text x="{x + 3:.1f}" y="{PAD_T + 30 + 13 * k}" font-size="10">{name} {getattr(th, name):.4g}</text>')
    label = "before the retrain (first model)" if phase == "before" else "after the retrain (new model)"
    body.append(f'<text x="{width - PAD_R - 4}" y="{PAD_T + 14}" text-anchor="end" font-size="12" '
                f'font-weight="bold">{html.escape(label)}</text>')
    x = PAD_L + 4
    for kind, scores in groups.items():
        text = f"{kind} ({len(scores):,})"
        body.append(f'<line x1="{x}" x2="{x + 18}" y1="{height - 12}" y2="{height - 12}" stroke="{colours[kind]}" '
                    f'stroke-width="3"/>')
        body.append(f'<text x="{x + 22}" y="{height - 8}" font-size="11">{html.escape(text)}</text>')
        x += 34 + 7 * len(text)
    return _svg(body, title=f"score distribution {phase} the retrain", width=width, height=height)


def before_after_svg(result: DemoResult) -> str:
    """Grouped bars: the wave's recall (all, model alone) and the false-positive rate, before and after."""
    f = result.figures()
    measures = [("wave recall", "wave_recall"), ("wave recall, model alone", "wave_model_recall"),
                ("false-positive rate", "false_positive_rate")]
    width, height = WIDTH, 260
    body, sx, sy = _axes(0, len(measures), 1.0, y_label="share", width=width, height=height,
                         x_ticks=[(i + 0.5, name) for i, (name, _k) in enumerate(measures)],
                         y_ticks=[(v / 4, f"{25 * v}%") for v in range(5)])
    bar = (sx(1) - sx(0)) * 0.3
    for i, (_name, key) in enumerate(measures):
        for j, (phase, colour) in enumerate((("before", "#bdbdbd"), ("after", "#31a354"))):
            value = f[phase][key] or 0.0
            x = sx(i + 0.5) - bar + j * bar
            body.append(f'<rect x="{x:.1f}" y="{sy(value):.1f}" width="{bar - 4:.1f}" '
                        f'height="{sy(0) - sy(value):.1f}" fill="{colour}"/>')
            body.append(f'<text x="{x + (bar - 4) / 2:.1f}" y="{sy(value) - 4:.1f}" text-anchor="middle" '
                        f'font-size="11">{_pct(f[phase][key])}</text>')
    x = width - PAD_R - 220
    for phase, colour in (("before the retrain", "#bdbdbd"), ("after the retrain", "#31a354")):
        body.append(f'<rect x="{x}" y="{PAD_T + 6}" width="14" height="10" fill="{colour}"/>')
        body.append(f'<text x="{x + 18}" y="{PAD_T + 15}" font-size="11">{phase}</text>')
        x += 110
    return _svg(body, title="before and after the retrain", width=width, height=height)


# -- the page -------------------------------------------------------------------------------------

CSS = """
body { font-family: sans-serif; color: #222; max-width: 1000px; margin: 24px auto; padding: 0 16px; }
h1 { font-size: 24px; margin-bottom: 4px; } h2 { font-size: 18px; margin-top: 28px; }
p.lead { color: #555; margin-top: 0; }
table { border-collapse: collapse; margin: 8px 0; } td, th { padding: 4px 12px; border-bottom: 1px solid #e5e5e5; }
th { text-align: left; background: #f5f5f5; } td.num { text-align: right; font-variant-numeric: tabular-nums; }
ol.story li { margin: 3px 0; } .row { display: flex; gap: 20px; } .note { color: #666; font-size: 13px; }
"""


def story_items(result: DemoResult) -> list[str]:
    items = [f"{_clock(result.scenario.start_ts)} the first model <code>{html.escape(result.first_model)}</code> "
             f"is trained on the forum's history and promoted; two workers start scoring."]
    items.append(f"{_clock(result.wave_start_ts)} the spam wave begins: near-duplicate testimonials for an invented "
                 f"soil additive from hundreds of new accounts, in words the first model has never seen.")
    seen = set()
    for e in result.events:
        d = e["data"]
        if e["type"] == "campaign_start" and "campaign" not in seen:
            seen.add("campaign")
            items.append(f"{_clock(e['ts'])} campaign alarm on {html.escape(str(d.get('site')))}: "
                         f"{d.get('members')} near-duplicates from {d.get('authors')} or more accounts; members are held.")
        elif e["type"] == "wave_start" and ("wave", d.get("site")) not in seen:
            seen.add(("wave", d.get("site")))
            ts = (d.get("minute", e["ts"] // 60) + 1) * 60.0
            items.append(f"{_clock(ts)} flagged-rate wave alarm on {html.escape(str(d.get('site')))}: "
                         f"{d.get('rate', 0):.0%} flagged against a baseline of {d.get('baseline', 0):.0%}.")
    items.append(f"every 5 minutes moderators label the oldest held comments and the spam readers report: "
                 f"{sum(result.labels_sent.values())} labels in all.")
    if result.retrain_ts:
        report = result.retrain_report
        gate = report.get("gate", {}).get("sets", {}).get("holdout", {})
        auc = ""
        if report.get("chosen") in gate:
            auc = (f" (holdout ROC-AUC {gate['active']['roc_auc']:.3f} &rarr; {gate[report['chosen']]['roc_auc']:.3f}, "
                   f"{html.escape(report['chosen'].replace('_', ' '))})")
        items.append(f"{_clock(result.retrain_ts)} the nightly retrain runs through the gate: "
                     f"{html.escape(str(report.get('decision', '?')))}{auc}; the workers hot-reload "
                     f"<code>{html.escape(result.retrained_model or '-')}</code> and the hold queue is re-scored.")
    items.append(f"{_clock(result.scenario.start_ts + result.scenario.duration_s)} the same wave goes on, "
                 f"and the model now catches it itself.")
    return items


def render_html(result: DemoResult, *, backend: str) -> str:
    rows = "".join(f"<tr><td>{html.escape(n)}</td><td class=num>{html.escape(b)}</td>"
                   f"<td class=num>{html.escape(a)}</td></tr>" for n, b, a in summary_rows(result))
    f = result.figures()
    delays = f["detection_delay_s"]
    facts = [
        ("detection delay, campaign", _delay(delays["campaign_start"])),
        ("detection delay, flagged-rate wave", _delay(delays["wave_start"])),
        ("moderator labels sent", f"{sum(result.labels_sent.values()):,}"),
        ("throughput through the workers", f"{f['throughput']:,.0f} comments/s on {backend} "
                                           f"(batches of ~{_mean_batch(result):.0f})"),
        ("whole demo", f"{result.wall_seconds:.1f} s"),
    ]
    fact_rows = "".join(f"<tr><td>{html.escape(k)}</td><td class=num>{html.escape(v)}</td></tr>" for k, v in facts)
    story = "".join(f"<li>{item}</li>" for item in story_items(result))
    metric_rows = "".join(f"<tr><td><code>{html.escape(k)}</code></td><td class=num>{v:,.0f}</td></tr>"
                          for k, v in sorted(result.metrics.items()))
    day = datetime.fromtimestamp(result.scenario.start_ts, tz=timezone.utc).strftime("%Y-%m-%d")
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>Seawall demo report</title>
<meta name="viewport" content="width=device-width, initial-scale=1"><style>{CSS}</style></head>
<body>
<h1>Seawall demo: a spam wave on Hedgerow Lane</h1>
<p class="lead">An invented neighbourhood gardening-and-cycling forum, one simulated hour around the nightly
retrain ({day}, times UTC), played through Seawall's real workers, detectors, feedback and retrain on {html.escape(backend)}.</p>
<h2>The story</h2><ol class="story">{story}</ol>
<h2>Summary</h2>
<table><tr><th></th><th>before the retrain</th><th>after the retrain</th></tr>{rows}</table>
<table>{fact_rows}</table>
<h2>What a scrape of the workers' metrics shows at the end</h2>
<table>{metric_rows}</table>
<h2>Flagged rate over time</h2>
{flagged_rate_svg(result)}
<p class="note">Red: share of each minute's comments held or rejected (by the model or the campaign policy).
Blue dashes: the wave's true share of the traffic. Dashed verticals: the first campaign alarm, the first
flagged-rate alarm, the retrain with the workers' hot reload.</p>
<h2>Score distribution</h2>
<div class="row">{score_histogram_svg(result, "before")}{score_histogram_svg(result, "after")}</div>
<p class="note">The verdicts' scores by kind of comment, on a log-odds axis (counts on a log scale); dashed
lines are the serving model's hold and reject thresholds. Before the retrain the wave scores like ordinary
comments and only the campaign policy holds it; after it, the model scores it like spam.</p>
<h2>Before and after</h2>
{before_after_svg(result)}
<p class="note">All data on this page is invented (see <code>ops/lab/scenario.py</code>); no real people, sites or products.</p>
</body></html>
"""
