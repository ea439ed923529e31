"""The replay report: one HTML page with PNG plots beside it, readable offline.

``report.html`` references ``plots/*.png`` in the same folder (no scripts, no fonts, no network),
so the folder can be zipped, mailed and opened from disk. For each run the page shows a verdict in
plain words, a figure of held-out loss (raw vs averaged) with the progressive loss, the step size
and the distance between the two iterates, with rollbacks and restarts marked; one figure and one
table compare the runs. A caution box says what the numbers are for.
"""

from __future__ import annotations

import html
import math
from pathlib import Path

import numpy as np

__all__ = ["CAUTION", "verdict", "write_report"]

CAUTION = ("Decision support only. A replay shows how a learning configuration behaves on a recorded "
           "feed; it does not certify a model. Temperature decisions for cold-chain food or medicine "
           "defer to the regulated instruments, local regulations and licensed practice.")

_LOSS_UNITS = {
    "squared": "\u00bd error\u00b2, target unit\u00b2",
    "huber": "Huber, target unit",
    "logistic": "log loss, nats",
}
_ROLLBACK = dict(color="#d95f02", linestyle="--", linewidth=1.0)
_RESTART = dict(color="#7570b3", linestyle="-", linewidth=1.6)


def _events(items: list[dict], limit: int = 6) -> str:
    marks = [f"{i['event']:,}" for i in items[:limit]]
    more = f" and {len(items) - limit} more" if len(items) > limit else ""
    return ", ".join(marks) + more


def verdict(run: dict) -> str:
    """A plain-words verdict: ``stable``, or what the monitor did and when.

    >>> verdict({"rollbacks": [], "restarts": [], "serving": "averaged"})
    'stable: no rollbacks or restarts; serving the averaged iterate'
    >>> verdict({"rollbacks": [{"event": 31608}, {"event": 32398}], "restarts": [{"event": 57800}],
    ...          "serving": "raw"})
    'rolled back 2 times at events 31,608, 32,398; restarted at event 57,800 after a change; serving the raw iterate'
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
    if ignored:
        parts.insert(0, f"not stable: {ignored:,} rollback alarm{'s' if ignored > 1 else ''} that this config "
                        "does not act on (rollback = false)")
    elif _doubts(run):
        parts.insert(0, "not stable: " + "; ".join(_doubts(run)))
    elif not rb and not rs:
        parts.insert(0, "stable: no rollbacks or restarts")
    parts.append(f"serving the {run.get('serving', 'averaged')} iterate")
    return "; ".join(parts)


def _doubts(run: dict) -> list[str]:
    """What forbids the verdict "stable": the monitor's standing warnings (a binding constraint), and a
    model whose loss is above the baseline's (``baseline_loss``, on the same events).

    >>> _doubts({"progressive_loss": 2.0, "baseline_loss": 1.5, "warnings": []})
    ["the model's loss 2 is above the baseline's 1.5"]
    """
    doubts = list(run.get("warnings") or [])
    loss, base = run.get("progressive_loss"), run.get("baseline_loss")
    if isinstance(loss, (int, float)) and isinstance(base, (int, float)) and loss > base:
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


def _notes(ax, notes: list[dict], label: bool) -> None:
    """Known facts about the feed: shaded spans (``start``, ``stop``) and dotted lines (``event``)."""
    for k, note in enumerate(notes):
        text = note["label"] if label else None
        if "start" in note:
            ax.axvspan(note["start"], note["stop"], color="#fdb863", alpha=0.35, linewidth=0, label=text)
        else:
            ax.axvline(note["event"], color="#555555", linestyle=":", linewidth=1.4, label=text)


def _marks(ax, run: dict, label: bool) -> None:
    for k, item in enumerate(run.get("rollbacks") or []):
        ax.axvline(item["event"], label="rollback" if label and k == 0 else None, **_ROLLBACK)
    for k, item in enumerate(run.get("restarts") or []):
        ax.axvline(item["event"], label="restart" if label and k == 0 else None, **_RESTART)


def _positive(values) -> np.ndarray:
    """Values for a log axis: non-positive and missing ones become gaps."""
    x = np.asarray(values, dtype=np.float64)
    return np.where(x > 0, x, np.nan)


def _run_figure(plt, path: Path, run: dict, trace: dict, loss_unit: str, notes: list[dict]) -> None:
    ev = np.asarray(trace["event"], dtype=np.float64)
    fig, axes = plt.subplots(3, 1, figsize=(10, 8.2), sharex=True, height_ratios=[2.2, 1, 1])
    ax = axes[0]
    ax.plot(ev, _positive(trace["progressive_loss"]), color="#bbbbbb", linewidth=0.9,
            label="progressive loss (serving iterate, before learning)")
    ax.plot(ev, _positive(trace["holdout_raw"]), color="#1b9e77", linewidth=1.2, label="held-out loss, raw iterate")
    ax.plot(ev, _positive(trace["holdout_avg"]), color="#e7298a", linewidth=1.6,
            label="held-out loss, averaged iterate")
    _notes(ax, notes, label=True)
    _marks(ax, run, label=True)
    ax.set_yscale("log")
    ax.set_ylabel(f"loss ({loss_unit})")
    ax.set_title(f"{run['name']}: {run['verdict']}", fontsize=10, loc="left", wrap=True)
    ax.legend(loc="upper right", fontsize=8, framealpha=0.9)
    ax.grid(True, which="major", alpha=0.3)
    ax = axes[1]
    ax.plot(ev, _positive(trace["step"]), color="#1f78b4", linewidth=1.2, label="step size of the last update")
    _notes(ax, notes, label=False)
    _marks(ax, run, label=False)
    ax.set_yscale("log")
    ax.set_ylabel("step size \u03b7\n(model coordinates)")
    ax.grid(True, alpha=0.3)
    ax = axes[2]
    ax.plot(ev, _positive(trace["distance"]), color="#333333", linewidth=1.2, label="\u2016raw \u2212 averaged\u2016")
    _notes(ax, notes, label=False)
    _marks(ax, run, label=False)
    ax.set_yscale("log")
    ax.set_ylabel("\u2016w_raw \u2212 w_avg\u2016\u2082\n(model coordinates)")
    ax.set_xlabel("events replayed (count)")
    ax.grid(True, alpha=0.3)
    ax.xaxis.set_major_formatter(plt.FuncFormatter(lambda x, _: f"{x:,.0f}"))
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def _compare_figure(plt, path: Path, runs: list[dict], traces: list[dict], loss_unit: str, notes: list[dict]) -> None:
    fig, axes = plt.subplots(2, 1, figsize=(10, 6.4), sharex=True)
    for k, ax in enumerate(axes):
        _notes(ax, notes, label=k == 0)
    colors = plt.rcParams["axes.prop_cycle"].by_key()["color"]
    for k, (run, trace) in enumerate(zip(runs, traces)):
        color = colors[k % len(colors)]
        ev = np.asarray(trace["event"], dtype=np.float64)
        loss = np.asarray(trace["progressive_loss"], dtype=np.float64)
        axes[0].plot(ev, _positive(loss), color=color, linewidth=1.2, label=run["name"])
        serving = np.asarray([s == "raw" for s in trace["serving"]])
        held = np.where(serving, trace["holdout_raw"], trace["holdout_avg"]) if len(ev) else np.zeros(0)
        axes[1].plot(ev, _positive(held), color=color, linewidth=1.2, label=run["name"])
    axes[0].set_ylabel(f"progressive loss\n({loss_unit})")
    axes[0].set_title("progressive loss between checks: each event scored by the serving iterate before it "
                      "is learned", fontsize=10, loc="left")
    axes[1].set_ylabel(f"held-out loss of the\nserving iterate ({loss_unit})")
    axes[1].set_xlabel("events replayed (count)")
    for ax in axes:
        ax.set_yscale("log")
        ax.grid(True, alpha=0.3)
        ax.legend(loc="upper right", fontsize=8)
    axes[1].xaxis.set_major_formatter(plt.FuncFormatter(lambda x, _: f"{x:,.0f}"))
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def _table(runs: list[dict]) -> str:
    head = ["run", "events", "learned", "held out", "rejected", "duplicates", "progressive loss",
            "held-out loss raw", "held-out loss averaged", "serving", "rollbacks", "restarts", "events/s",
            "certificate (bound on expected suboptimality)", "state digest"]
    rows = []
    for r in runs:
        h = r.get("holdout_loss") or {}
        cells = [r["name"], _num(r["events"]), _num(r["learned"]), _num(r["held_out"]), _num(r["rejected"]),
                 _num(r.get("duplicates", 0)), _num(r.get("progressive_loss")), _num(h.get("raw")),
                 _num(h.get("averaged")), r.get("serving", "-"), _num(len(r.get("rollbacks") or [])),
                 _num(len(r.get("restarts") or [])), _num(round(r.get("events_per_second") or 0)),
                 _certificate(r.get("certificate") or {}), f"<code>{r['state_digest'][:16]}</code>"]
        rows.append("<tr>" + "".join(f"<td>{c if c.startswith('<code>') else html.escape(c)}</td>" for c in cells)
                    + "</tr>")
    return ("<div class='wide'><table><thead><tr>" + "".join(f"<th>{html.escape(h)}</th>" for h in head) + "</tr></thead><tbody>"
            + "".join(rows) + "</tbody></table></div>")


def _incidents(run: dict) -> str:
    items = [("rollback", i) for i in run.get("rollbacks") or []] + [("restart", i) for i in run.get("restarts") or []]
    items.sort(key=lambda t: t[1]["event"])
    if not items:
        return "<p>No rollbacks or restarts.</p>"
    lis = "".join(f"<li><b>{kind}</b> at event {i['event']:,}: {html.escape(i['reason'])}</li>"
                  for kind, i in items[:40])
    more = f"<li>... and {len(items) - 40} more (see summary.json)</li>" if len(items) > 40 else ""
    return f"<ul>{lis}{more}</ul>"


def _rejections(run: dict) -> str:
    reasons = run.get("rejected_by_reason") or {}
    if not reasons:
        return ""
    lis = "".join(f"<li>{n:,} &times; {html.escape(k)}</li>" for k, n in sorted(reasons.items(), key=lambda t: -t[1]))
    return f"<details><summary>{run['rejected']:,} rejected lines by reason</summary><ul>{lis}</ul></details>"


def _notes_html(notes: list[dict]) -> str:
    if not notes:
        return ""
    lis = "".join(f"<li>{html.escape(n['label'])}: events {n['start']:,} to {n['stop']:,}</li>" if "start" in n
                  else f"<li>{html.escape(n['label'])}: event {n['event']:,}</li>" for n in notes)
    return f"<h2>What the feed contains</h2><ul>{lis}</ul>"


_STYLE = """body{font-family:system-ui,-apple-system,Segoe UI,Helvetica,Arial,sans-serif;margin:2em auto;
max-width:1100px;color:#222;padding:0 1em}table{border-collapse:collapse;font-size:13px;margin:1em 0}th,td{border:1px solid #ccc;
padding:4px 6px;text-align:right;vertical-align:top}th{background:#f3f3f3}td:first-child,th:first-child{text-align:left}
.caution{border:2px solid #b35806;background:#fff4e5;padding:0.8em 1em;margin:1em 0}.verdict{font-size:1.1em;
padding:0.4em 0.8em;border-left:5px solid #1b9e77;background:#f4faf7}.verdict.acted{border-left-color:#d95f02;
background:#fdf5ef}img{max-width:100%;border:1px solid #ddd}code{font-size:12px}.wide{overflow-x:auto}"""


def write_report(out: str | Path, summary: dict, results: list[dict], notes: list[dict] | None = None) -> Path:
    """Render ``report.html`` and its plots into ``out``; return the page's path.

    ``notes`` are known facts about the feed drawn on every plot: ``{"start", "stop", "label"}``
    for a span, ``{"event", "label"}`` for a moment (the demo marks its gateway fault and its
    recalibration this way).
    """
    notes = notes or []
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    out = Path(out)
    plots = out / "plots"
    plots.mkdir(parents=True, exist_ok=True)
    runs = summary["runs"]
    traces = [r["trace"] for r in results]
    unit = _LOSS_UNITS.get(results[0].get("loss", "squared"), "loss")
    sections = []
    for run, res in zip(runs, results):
        unit = _LOSS_UNITS.get(res.get("loss", "squared"), "loss")
        name = f"run-{run['name']}.png"
        _run_figure(plt, plots / name, run, res["trace"], unit, notes)
        acted = " acted" if run.get("rollbacks") or run.get("restarts") else ""
        sections.append(
            f"<h2>{html.escape(run['name'])}</h2><p class='verdict{acted}'>{html.escape(run['verdict'])}</p>"
            f"<img src='plots/{name}' alt='held-out loss, step size and distance of run {html.escape(run['name'])}'>"
            f"<h3>What the monitor did</h3>{_incidents(run)}{_rejections(run)}")
    _compare_figure(plt, plots / "compare.png", runs, traces, unit, notes)
    feeds = ", ".join(html.escape(f) for f in summary.get("feeds", [summary.get("feed")]))
    verdicts = "".join(f"<li><b>{html.escape(r['name'])}</b>: {html.escape(r['verdict'])}</li>" for r in runs)
    page = (f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>trimtab replay report</title>"
            f"<style>{_STYLE}</style></head><body><h1>Replay report</h1><p>Feed: <code>{feeds}</code></p>"
            f"<div class='caution'><b>Caution.</b> {html.escape(CAUTION)}</div>"
            f"{_notes_html(notes)}<h2>Runs side by side</h2>{_table(runs)}"
            f"<ul>{verdicts}</ul>"
            f"<img src='plots/compare.png' alt='progressive and held-out loss of every run'>"
            f"{''.join(sections)}<p><small>Loss is the config's loss; events count the valid events applied, "
            "in feed order. Model coordinates are the features after warm-up scaling. "
            "Details: summary.json and &lt;run&gt;/model.json next to this page.</small></p></body></html>")
    path = out / "report.html"
    path.write_text(page, encoding="utf-8")
    return path
