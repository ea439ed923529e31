"""The replay report: one self-contained HTML page with its plots embedded, readable offline.

``report.html`` carries its plots inside the page as inline SVG (:mod:`service.replay.figures`; no
scripts, no fonts, no network), so the one file can be mailed and opened from disk. For each run the page shows a verdict
in plain words and its warnings, a figure of held-out loss (raw vs averaged) with the progressive
loss and the baseline's (the running mean of the target, or the base rate), the step size and the
distance between the two iterates, with rollbacks and restarts marked; with several runs one figure
and the table compare them. A caution box says what the numbers are for: the cold-chain wording for
the demo feed only, a general one otherwise.

Every series is thinned to a min/max envelope of at most a few thousand points
(:mod:`service.replay.plotdata`), so drawing takes the same time whatever the feed's length. A run
without held-out events (monitor off, ``holdout_share = 0``, a feed too short) or without any
check draws what it has and says what is missing instead of failing on an empty log axis.
Drawing a page takes a few tens of milliseconds in the replay's own process.
"""

from __future__ import annotations

import math
from pathlib import Path

from service.replay.plotdata import thin_trace

__all__ = ["CAUTION", "DEMO_CAUTION", "ReportFailed", "verdict", "write_report"]


class ReportFailed(Exception):
    """The page could not be drawn or written (the run's other outputs are not affected); ``str()`` says why."""

#: The caution for any feed: what a replay's numbers are, and are not, good for.
CAUTION = ("Decision support only. A replay shows how a learning configuration behaves on a recorded "
           "feed; it does not certify a model. Where safety, health or credit decisions are involved, keep "
           "the established controls in place and defer to local regulations and licensed practice.")

#: The demo's caution: its invented cold-chain feed stands for decisions about food and medicine.
DEMO_CAUTION = ("Decision support only. A replay shows how a learning configuration behaves on a recorded "
                "feed; it does not certify a model. The cold-chain data is invented for the demo. Temperature "
                "decisions for cold-chain food or medicine defer to the regulated instruments, local "
                "regulations and licensed practice.")

_LOSS_UNITS = {
    "squared": "\u00bd error\u00b2, target unit\u00b2",
    "huber": "Huber, target unit",
    "logistic": "log loss, nats",
}


def _escape(text: str) -> str:
    """:func:`html.escape`, imported on first use: every replay reads :func:`verdict`, only a report draws."""
    import html

    return html.escape(text)


def _events(items: list[dict], limit: int = 6) -> str:
    marks = [f"{i['event']:,}" for i in items[:limit]]
    more = f" and {len(items) - limit} more" if len(items) > limit else ""
    return ", ".join(marks) + more


def verdict(run: dict) -> str:
    """A plain-words verdict: ``stable``, ``diverged`` (the weights or the loss blew up, ``run["diverged"]``
    says how), or what the monitor did and when.

    >>> verdict({"rollbacks": [], "restarts": [], "serving": "averaged"})
    'stable: no rollbacks or restarts; serving the averaged iterate'
    >>> verdict({"rollbacks": [{"event": 31608}, {"event": 32398}], "restarts": [{"event": 57800}],
    ...          "serving": "raw"})
    'rolled back 2 times at events 31,608, 32,398; restarted at event 57,800 after a change; serving the raw iterate'
    >>> verdict({"rollbacks": [{"event": 500}], "restarts": [], "diverged": "the weights blew up", "serving": "raw"})
    'diverged: the weights blew up; rolled back 1 time at event 500; serving the raw iterate'
    """
    rb, rs = run.get("rollbacks") or [], run.get("restarts") or []
    parts = []
    if rb:
        parts.append(f"rolled back {len(rb)} time{'s' if len(rb) > 1 else ''} at "
                     f"event{'s' if len(rb) > 1 else ''} {_events(rb)}")
    if rs:
        parts.append(f"restarted at event{'s' if len(rs) > 1 else ''} {_events(rs)} after a change")
    bursts = run.get("rejected_bursts") or []
    if bursts:
        parts.append(f"{len(bursts)} burst{'s' if len(bursts) > 1 else ''} of rejected input "
                     f"(from event {bursts[0]['event']:,})")
    ignored = run.get("alarms_ignored") or 0
    if run.get("diverged"):
        parts.insert(0, f"diverged: {run['diverged']}")
    elif ignored:
        parts.insert(0, f"not stable: {ignored:,} rollback alarm{'s' if ignored > 1 else ''} that this config "
                        "does not act on (rollback = false)")
    elif _doubts(run):
        parts.insert(0, "not stable: " + "; ".join(_doubts(run)))
    elif not rb and not rs:
        parts.insert(0, "stable: no rollbacks or restarts")
    parts.append(f"serving the {run.get('serving', 'averaged')} iterate")
    return "; ".join(parts)


def _doubts(run: dict) -> list[str]:
    """What forbids the verdict "stable": the run's standing warnings (a binding constraint, a model no
    better than the baseline) and a progressive loss above the baseline's (``baseline_loss``, on the
    same events).

    >>> _doubts({"progressive_loss": 2.0, "baseline_loss": {"progressive": 1.5, "holdout": None}, "warnings": []})
    ["the model's loss 2 is above the baseline's 1.5"]
    """
    doubts = list(run.get("warnings") or [])
    loss, base = run.get("progressive_loss"), (run.get("baseline_loss") or {}).get("progressive")
    if isinstance(loss, (int, float)) and isinstance(base, (int, float)) and loss > base and not any(
            "baseline" in d for d in doubts):
        doubts.append(f"the model's loss {loss:.4g} is above the baseline's {base:.4g}")
    return doubts


def _num(x, digits: int = 4) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "-"
    if isinstance(x, int):
        return f"{x:,}"
    return f"{x:.{digits}g}"


def _certificate(c: dict) -> str:
    if not c:
        return "-"
    if c.get("applicable") and c.get("bound") is not None:
        est = ", G estimated" if c.get("G_estimated") else ""
        return f"{c['bound']:.3g} after T = {c['T']:,} ({c['rule']}{est})"
    why = (c.get("reason") or "not applicable").split(":")[0]
    return f"none ({c.get('rule')}): {why}"


def _table(runs: list[dict]) -> str:
    head = ["run", "events", "learned", "held out", "rejected", "duplicates", "progressive loss",
            "baseline progressive loss", "held-out loss raw", "held-out loss averaged", "baseline held-out loss",
            "serving", "rollbacks", "restarts", "warnings", "events/s",
            "certificate (bound on expected suboptimality)", "state digest"]
    rows = []
    for r in runs:
        h = r.get("holdout_loss") or {}
        b = r.get("baseline_loss") or {}
        cells = [r["name"], _num(r["events"]), _num(r["learned"]), _num(r["held_out"]), _num(r["rejected"]),
                 _num(r.get("duplicates", 0)), _num(r.get("progressive_loss")), _num(b.get("progressive")),
                 _num(h.get("raw")), _num(h.get("averaged")), _num(b.get("holdout")), r.get("serving", "-"),
                 _num(len(r.get("rollbacks") or [])), _num(len(r.get("restarts") or [])),
                 _num(len(r.get("warnings") or [])), _num(round(r.get("events_per_second") or 0)),
                 _certificate(r.get("certificate") or {}), f"<code>{r['state_digest'][:16]}</code>"]
        rows.append("<tr>" + "".join(f"<td>{c if c.startswith('<code>') else _escape(c)}</td>" for c in cells)
                    + "</tr>")
    return ("<div class='wide'><table><thead><tr>" + "".join(f"<th>{_escape(h)}</th>" for h in head)
            + "</tr></thead><tbody>" + "".join(rows) + "</tbody></table></div>")


def _binary_table(runs: list[dict]) -> str:
    """Accuracy at 0.5, ROC AUC, Brier score, log loss and base rate of the binary runs, progressive
    (each event scored before it was learned) and on the held-out window at the end; empty without any."""
    head = ["run", "figure", "events", "accuracy at 0.5", "ROC AUC", "Brier score", "log loss (nats)", "base rate"]
    rows = []
    for r in runs:
        metrics = r.get("binary_metrics")
        if not metrics:
            continue
        for where, label in (("progressive", "progressive"), ("holdout", "held-out window")):
            m = metrics.get(where) or {}
            cells = [r["name"], f"{label} ({metrics.get('iterate', '-')} iterate)", _num(m.get("count")),
                     _num(m.get("accuracy")), _num(m.get("roc_auc")), _num(m.get("brier")), _num(m.get("log_loss")),
                     _num(m.get("base_rate"))]
            rows.append("<tr>" + "".join(f"<td>{_escape(c)}</td>" for c in cells) + "</tr>")
    if not rows:
        return ""
    return ("<h3>Binary metrics</h3><div class='wide'><table><thead><tr>"
            + "".join(f"<th>{_escape(h)}</th>" for h in head) + "</tr></thead><tbody>" + "".join(rows)
            + "</tbody></table></div><p><small>The progressive ROC AUC is that of the probabilities rounded down "
              "to 1/1024 (a running histogram); the held-out one is exact.</small></p>")


def _warnings(run: dict) -> str:
    items = run.get("warnings") or []
    if not items:
        return ""
    return "<ul class='warnings'>" + "".join(f"<li><b>Warning:</b> {_escape(w)}</li>" for w in items) + "</ul>"


def _scale(incident: dict) -> str:
    """A rollback's new step scale (every later step is multiplied by it)."""
    scale = incident.get("step_scale")
    return f" (later steps now scaled by {scale:.4g})" if isinstance(scale, (int, float)) else ""


def _incidents(run: dict) -> str:
    items = [("rollback", i) for i in run.get("rollbacks") or []] + [("restart", i) for i in run.get("restarts") or []]
    items.sort(key=lambda t: t[1]["event"])
    if not items:
        return "<p>No rollbacks or restarts.</p>"
    lis = "".join(f"<li><b>{kind}</b> at event {i['event']:,}: {_escape(i['reason'])}{_scale(i)}</li>"
                  for kind, i in items[:40])
    more = f"<li>... and {len(items) - 40} more (see summary.json)</li>" if len(items) > 40 else ""
    return f"<ul>{lis}{more}</ul>"


def _rejections(run: dict) -> str:
    reasons = run.get("rejected_by_reason") or {}
    if not reasons:
        return ""
    lis = "".join(f"<li>{n:,} &times; {_escape(k)}</li>" for k, n in sorted(reasons.items(), key=lambda t: -t[1]))
    return f"<details><summary>{run['rejected']:,} rejected lines by reason</summary><ul>{lis}</ul></details>"


def _notes_html(notes: list[dict]) -> str:
    if not notes:
        return ""
    lis = "".join(f"<li>{_escape(n['label'])}: events {n['start']:,} to {n['stop']:,}</li>" if "start" in n
                  else f"<li>{_escape(n['label'])}: event {n['event']:,}</li>" for n in notes)
    return f"<h2>What the feed contains</h2><ul>{lis}</ul>"


_STYLE = """body{font-family:system-ui,-apple-system,Segoe UI,Helvetica,Arial,sans-serif;margin:2em auto;
max-width:1100px;color:#222;padding:0 1em}table{border-collapse:collapse;font-size:13px;margin:1em 0}th,td{border:1px solid #ccc;
padding:4px 6px;text-align:right;vertical-align:top}th{background:#f3f3f3}td:first-child,th:first-child{text-align:left}
.caution{border:2px solid #b35806;background:#fff4e5;padding:0.8em 1em;margin:1em 0}.verdict{font-size:1.1em;
padding:0.4em 0.8em;border-left:5px solid #1b9e77;background:#f4faf7}.verdict.acted{border-left-color:#d95f02;
background:#fdf5ef}ul.warnings{color:#8c2d04}figure.chart{margin:1em 0}figure.chart svg{max-width:100%;height:auto;border:1px solid #ddd}code{font-size:12px}.wide{overflow-x:auto}"""


def figure(svg: str, alt: str) -> str:
    """An inline ``<svg>`` figure with its text alternative (screen readers read ``aria-label``)."""
    return f"<figure class='chart' aria-label='{_escape(alt)}'>{svg}</figure>"


def write_report(out: str | Path, summary: dict, results: list[dict], notes: list[dict] | None = None,
                 caution: str = CAUTION) -> Path:
    """Render ``report.html`` into ``out``; return the page's path.

    ``results`` are the runs' results in summary order, each with its ``loss`` name and either its
    ``trace`` or the trace already thinned (``plot``, :func:`~service.replay.plotdata.thin_trace`).
    ``notes`` are known facts about the feed drawn on every plot: ``{"start", "stop", "label"}``
    for a span, ``{"event", "label"}`` for a moment (the demo marks its gateway fault and its
    recalibration this way). ``caution`` is the page's caution (:data:`CAUTION`, or
    :data:`DEMO_CAUTION` for the demo feed).
    """
    notes = notes or []
    from service.replay.figures import compare_figure, run_figure

    out = Path(out)
    runs = summary["runs"]
    plots = [r["plot"] if "plot" in r else thin_trace(r["trace"]) for r in results]
    sections = []
    for run, res, plot in zip(runs, results, plots):
        unit = _LOSS_UNITS.get(res.get("loss", "squared"), "loss")
        svg = run_figure(run, plot, unit, notes)
        acted = " acted" if (run.get("rollbacks") or run.get("restarts") or run.get("warnings")
                             or run.get("diverged")) else ""
        sections.append(
            f"<h2>{_escape(run['name'])}</h2><p class='verdict{acted}'>{_escape(run['verdict'])}</p>"
            f"{_warnings(run)}{figure(svg, 'loss with its baseline, step size and distance of run ' + run['name'])}"
            f"<h3>What the monitor did</h3>{_incidents(run)}{_rejections(run)}")
    compare = ""
    if len(runs) > 1:
        unit = _LOSS_UNITS.get(results[0].get("loss", "squared"), "loss")
        compare = figure(compare_figure(runs, plots, unit, notes), "progressive and held-out loss of every run")
    feeds = ", ".join(_escape(f) for f in summary.get("feeds", [summary.get("feed")]))
    verdicts = "".join(f"<li><b>{_escape(r['name'])}</b>: {_escape(r['verdict'])}</li>" for r in runs)
    title = "Runs side by side" if len(runs) > 1 else "The run"
    page = (f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>trimtab replay report</title>"
            f"<style>{_STYLE}</style></head><body><h1>Replay report</h1><p>Feed: <code>{feeds}</code></p>"
            f"<div class='caution'><b>Caution.</b> {_escape(caution)}</div>"
            f"{_notes_html(notes)}<h2>{title}</h2>{_table(runs)}{_binary_table(runs)}<ul>{verdicts}</ul>{compare}"
            f"{''.join(sections)}<p><small>Loss is the config's loss; the baseline predicts the running mean "
            "of the target (the base rate for a binary task) from the events learned so far, scored on the same "
            "events. Events count the valid events applied, in feed order. &lt;run&gt;/model.json gives both iterates "
            "in the features' own units (raw, averaged) and in the model's coordinates, the numeric features after "
            "warm-up scaling (scaled), with the scaling's means and deviations (docs/model-file.md). Details: "
            "summary.json and &lt;run&gt;/model.json next to this page; &lt;run&gt;/state.bin is the final state "
            "that trimtab serve --start-from &lt;out&gt;/&lt;run&gt; continues from."
            "</small></p></body></html>")
    path = out / "report.html"
    path.write_text(page, encoding="utf-8")
    return path
