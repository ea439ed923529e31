"""The sweep's page, ``sweep.html``: the ranking and the best runs' curves, plots embedded.

The best runs (by the ranking of :func:`service.replay.sweep.rank`) are drawn by the replay
report's own figure functions (:mod:`service.replay.figures`), so a sweep's curves read exactly
like a replay's; they are inline SVG, so ``sweep.html`` is one file that can be mailed and opened from disk.
"""

from __future__ import annotations

import html
import json
from pathlib import Path

__all__ = ["BEST_DRAWN", "write_sweep_report"]

#: Runs whose curves are drawn (the best ones by held-out loss).
BEST_DRAWN = 3

_STYLE = """body{font-family:system-ui,-apple-system,Segoe UI,Helvetica,Arial,sans-serif;margin:2em auto;
max-width:1100px;color:#222;padding:0 1em}table{border-collapse:collapse;font-size:13px;margin:1em 0}th,td{border:1px solid #ccc;
padding:4px 6px;text-align:right;vertical-align:top}th{background:#f3f3f3}td.l,th.l{text-align:left}
.caution{border:2px solid #b35806;background:#fff4e5;padding:0.8em 1em;margin:1em 0}.note{border-left:5px solid #d95f02;
background:#fdf5ef;padding:0.4em 0.8em}figure.chart{margin:1em 0}figure.chart svg{max-width:100%;height:auto;border:1px solid #ddd}code{font-size:12px}.wide{overflow-x:auto}
tr.failed td{color:#a50026}"""


def _num(x) -> str:
    if x is None:
        return "-"
    if isinstance(x, int):
        return f"{x:,}"
    return f"{x:.5g}"


def _ranking_table(sweep: dict) -> str:
    keys = list(sweep.get("vary", {}))
    head = ["rank", "run", *keys, "held-out loss (serving)", "progressive loss", "rank by progressive",
            "rollbacks", "restarts", "attempts", "verdict", "state digest"]
    rows = []
    for r in sweep["ranking"]:
        cells = [_num(r["rank"]), r["name"], *[json.dumps(r["varied"].get(k)) for k in keys],
                 _num(r["holdout_loss"]), _num(r["progressive_loss"]), _num(r["rank_progressive"]),
                 _num(r["rollbacks"]), _num(r["restarts"]), _num(r["attempts"]), r["verdict"] or "-",
                 (r["state_digest"] or "")[:16]]
        rows.append("<tr>" + "".join(f"<td class='l'>{html.escape(c)}</td>" if k in (1, len(cells) - 2)
                                     else f"<td>{html.escape(c)}</td>" for k, c in enumerate(cells)) + "</tr>")
    for f in sweep.get("failed", []):
        cells = ["-", f["name"], *[json.dumps(f["varied"].get(k)) for k in keys]]
        rows.append("<tr class='failed'>" + "".join(f"<td>{html.escape(c)}</td>" for c in cells)
                    + f"<td class='l' colspan='{len(head) - len(cells)}'>failed after {f['attempts']} "
                      f"attempt(s): {html.escape(f['reason'] or '')}</td></tr>")
    return ("<div class='wide'><table><thead><tr>" + "".join(f"<th>{html.escape(h)}</th>" for h in head)
            + "</tr></thead><tbody>" + "".join(rows) + "</tbody></table></div>")


def _curves(sweep: dict, results: dict) -> str:
    """The replay report's figures for the best runs, drawn by the same functions and embedded."""
    from service.replay.figures import compare_figure, run_figure
    from service.replay.plotdata import thin_trace
    from service.replay.report import _LOSS_UNITS, figure

    best = [r["name"] for r in sweep["ranking"][:BEST_DRAWN]]
    runs = [results[name]["summary"] for name in best]
    plots = [results[name]["plot"] if "plot" in results[name] else thin_trace(results[name]["trace"])
             for name in best]
    parts = []
    if not best:
        return ""
    unit = _LOSS_UNITS.get(results[best[0]].get("loss", "squared"), "loss")
    if len(best) > 1:
        parts.append("<h2>The best runs side by side</h2>"
                     + figure(compare_figure(runs, plots, unit, []), "loss of the best runs"))
    for name, run, plot in zip(best, runs, plots):
        parts.append(f"<h3>{html.escape(name)}</h3><p>{html.escape(run.get('verdict', ''))}</p>")
        parts.append(figure(run_figure(run, plot, unit, []), f"loss, step size and distance of run {name}"))
    return "".join(parts)


def write_sweep_report(out: str | Path, sweep: dict, results: dict) -> Path:
    """Render ``sweep.html`` into ``out``; ``results`` maps run names to their replay results."""
    out = Path(out)
    feeds = ", ".join(html.escape(f) for f in sweep["feeds"])
    vary = "".join(f"<li><code>{html.escape(k)}</code>: {html.escape(', '.join(json.dumps(v) for v in vs))}</li>"
                   for k, vs in sweep.get("vary", {}).items())
    notes = "".join(f"<p class='note'>{html.escape(n)}</p>" for n in sweep.get("notes", []))
    ex = sweep.get("executor", {})
    where = (f"a local Dask cluster of {ex.get('workers')} worker processes" if ex.get("kind") == "local"
             else f"the Dask scheduler {ex.get('address')} ({ex.get('workers')} workers)")
    page = (f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>trimtab sweep</title>"
            f"<style>{_STYLE}</style></head><body><h1>Config sweep</h1>"
            f"<p>Feed: <code>{feeds}</code>. Base config: <code>{html.escape(str(sweep.get('base')))}</code>. "
            f"{sweep['completed']} of {sweep['runs']} runs completed on {html.escape(where)}.</p>"
            f"<div class='caution'><b>Caution.</b> {html.escape(sweep['caution'])}</div>"
            f"<h2>Varied</h2><ul>{vary}</ul>{notes}"
            f"<h2>Ranking</h2><p>Ranked by {html.escape(sweep['ranked_by'])}. Lower is better.</p>"
            f"{_ranking_table(sweep)}{_curves(sweep, results)}"
            "<p><small>Each run's folder holds config.toml (ready for <code>trimtab serve -c</code>), "
            "state.bin with state.json (the final engine state and its SHA-256) and model.json; "
            "summary.json and sweep.json hold every figure of this page.</small></p></body></html>")
    path = out / "sweep.html"
    path.write_text(page, encoding="utf-8")
    return path
