// trimtab's live page: polls /v1/health and /v1/incidents on this origin and draws hand-written SVG.
// No library, no other host. The token (for operator actions, and for reads where the service asks)
// lives only in the variable `token` below: never in storage, a cookie or the URL.
"use strict";

const POLL_MS = 2000;
const RETRY_MS = 1000;    // while the service cannot be reached
const TIMEOUT_MS = 4000;
const SVG = "http://www.w3.org/2000/svg";
const STYLE = {  // colour and dash: every pair of series differs in both
  avg: { color: "#2b5c8a", dash: "" }, raw: { color: "#d9822b", dash: "7 4" },
  base: { color: "#6b6b6b", dash: "2 3" }, violet: { color: "#5d4a9c", dash: "" },
  sienna: { color: "#8a5a2b", dash: "" },
};
const MARKS = { rollback: { color: "#b03a7a", glyph: "▼", letter: "R" },
                restart: { color: "#1f7a7a", glyph: "◆", letter: "S" } };
const LOSS_UNITS = {
  squared: "loss: ½·(score − target)², target unit²", huber: "Huber loss, target unit",
  logistic: "log loss, nats",
};
const EVENTS_AXIS = "events applied (count)";
const TIME_AXIS = "seconds before now (s)";

// [id, title, which data, y-axis title (a function of the health answer), series: [key, legend, style]]
const CHARTS = [
  ["holdout", "Held-out loss", "checks", (h) => LOSS_UNITS[h.model.loss],
   [["holdout_raw", "raw iterate", "raw"], ["holdout_avg", "averaged iterate", "avg"],
    ["baseline_holdout", "baseline", "base"]]],
  ["progressive", "Progressive loss (each event scored before it was learned)", "checks",
   (h) => LOSS_UNITS[h.model.loss], [["progressive_loss", "model", "avg"], ["baseline_progressive", "baseline", "base"]]],
  ["step", "Step size", "checks", () => "step length (scaled coordinates)", [["step", "step", "violet"]]],
  ["distance", "Distance between raw and averaged iterates", "checks",
   () => "‖raw − averaged‖ (scaled coordinates)", [["distance", "distance", "sienna"]]],
  ["rate", "Ingest rate", "pulse", () => "events applied per second (events/s)", [["rate", "applied", "avg"]]],
  ["queue", "Queue depth", "pulse", () => "events waiting (count)", [["queue", "queued", "violet"]]],
  ["rejected", "Rejected inputs", "pulse", () => "inputs rejected per second (1/s)", [["rejected", "rejected", "raw"]]],
];

let token = "";
let last = null;          // the newest health answer
let lastOk = 0;           // when it came (ms)
let lostSince = 0;
let firstDraw = true;
let armed = 0;            // a rollback needs a second click within 5 s

const $ = (id) => document.getElementById(id);

function fmt(x, digits = 3) {
  if (x === null || x === undefined || !isFinite(x)) return "–";
  const a = Math.abs(x);
  if (a >= 1e6) return (x / 1e6).toPrecision(digits) + "M";
  if (a >= 1e4) return (x / 1e3).toPrecision(digits) + "k";
  if (a >= 100) return Math.round(x).toString();
  if (a === 0) return "0";
  if (a < 1e-3) return x.toExponential(1);
  return Number(x.toPrecision(digits)).toString();
}

function count(n) { return n === null || n === undefined ? "–" : n.toLocaleString("en-US"); }

function ago(seconds) {
  if (seconds === null || seconds === undefined) return "–";
  if (seconds < 90) return Math.round(seconds) + " s";
  if (seconds < 5400) return Math.round(seconds / 60) + " min";
  return (seconds / 3600).toFixed(1) + " h";
}

function headers() { return token ? { Authorization: "Bearer " + token } : {}; }

async function getJSON(path) {
  const ctl = new AbortController();
  const timer = setTimeout(() => ctl.abort(), TIMEOUT_MS);
  try {
    const r = await fetch(path, { cache: "no-store", headers: headers(), signal: ctl.signal });
    const body = await r.json().catch(() => null);
    if (!r.ok) {
      const msg = body && body.error ? body.error.message : "HTTP " + r.status;
      const err = new Error(msg);
      err.status = r.status;
      throw err;
    }
    return body;
  } finally {
    clearTimeout(timer);
  }
}

// ------------------------------------------------------------------ charts
function el(name, attrs, parent) {
  const node = document.createElementNS(SVG, name);
  for (const [k, v] of Object.entries(attrs || {})) node.setAttribute(k, v);
  if (parent) parent.appendChild(node);
  return node;
}

function niceTicks(lo, hi, n) {
  if (!(hi > lo)) return [lo];
  const raw = (hi - lo) / n;
  const mag = Math.pow(10, Math.floor(Math.log10(raw)));
  const step = [1, 2, 5, 10].map((m) => m * mag).find((s) => s >= raw);
  const out = [];
  for (let v = Math.ceil(lo / step) * step; v <= hi + step * 1e-9; v += step) out.push(Math.abs(v) < step * 1e-9 ? 0 : v);
  return out;
}

function buildCharts() {
  const host = $("charts");
  for (const [id, title, , , series] of CHARTS) {
    const fig = document.createElement("figure");
    fig.className = "chart";
    fig.dataset.chart = id;
    const cap = document.createElement("figcaption");
    const strong = document.createElement("strong");
    strong.textContent = title;
    cap.appendChild(strong);
    for (const [, legend, style] of series) {
      const key = document.createElement("span");
      key.className = "key";
      const sample = el("svg", { class: "swatch", viewBox: "0 0 22 8", "aria-hidden": "true" });
      el("line", { x1: 1, y1: 4, x2: 21, y2: 4, stroke: STYLE[style].color, "stroke-width": 2,
                   "stroke-dasharray": STYLE[style].dash }, sample);
      key.appendChild(sample);
      key.appendChild(document.createTextNode(legend));
      cap.appendChild(key);
    }
    if (CHARTS.find((c) => c[0] === id)[2] === "checks") {
      for (const kind of ["rollback", "restart"]) {
        const key = document.createElement("span");
        key.className = "key";
        const g = document.createElement("span");
        g.style.color = MARKS[kind].color;
        g.textContent = MARKS[kind].glyph;
        key.appendChild(g);
        key.appendChild(document.createTextNode(kind));
        cap.appendChild(key);
      }
    }
    fig.appendChild(cap);
    const svg = el("svg", { class: "plot", role: "img", "aria-label": title });
    fig.appendChild(svg);
    host.insertBefore(fig, $("reading"));
  }
}

function seriesData(h, source, key) {
  if (source === "checks") {
    const s = h.model.checks[key] || { event: [], value: [] };
    return { x: s.event, y: s.value };
  }
  const now = h.now;
  return { x: h.pulse.t.map((t) => t - now), y: h.pulse[key] };
}

function drawChart(fig, h, spec) {
  const [id, title, source, yTitle, series] = spec;
  const svg = fig.querySelector("svg.plot");
  const W = Math.max(200, Math.round(svg.clientWidth || fig.clientWidth - 16));
  const H = Math.max(120, Math.round(svg.clientHeight || 170));
  svg.setAttribute("viewBox", `0 0 ${W} ${H}`);
  svg.replaceChildren();
  const data = series.map(([key, legend, style]) => ({ key, legend, style, ...seriesData(h, source, key) }));
  const xs = [], ys = [];
  for (const d of data) {
    d.x.forEach((x, i) => { const y = d.y[i]; if (y !== null && isFinite(y)) { xs.push(x); ys.push(y); } });
  }
  const L = 54, R = 10, T = 16, B = 30;
  const pw = W - L - R, ph = H - T - B;
  el("rect", { x: L, y: T, width: pw, height: ph, class: "frame" }, svg);
  if (ys.length < 2) {
    const why = source === "checks" && id === "holdout" && !h.model.held_out
      ? "no held-out events: the monitor is off or holdout_share is 0" : "waiting for data…";
    el("text", { x: L + 8, y: T + ph / 2, class: "empty" }, svg).textContent = why;
    fig.dataset.points = "0";
    return;
  }
  let xlo = Math.min(...xs), xhi = Math.max(...xs);
  if (source === "pulse") {
    xlo = Math.min(xlo, -60); xhi = 0;
  } else {  // from event 0, and far enough to show a rollback after the last check (an operator's)
    xlo = Math.min(xlo, 0);
    for (const m of h.model.marks) xhi = Math.max(xhi, m.event);
  }
  if (xhi === xlo) xhi = xlo + 1;
  const positive = ys.every((y) => y > 0);
  let ylo = Math.min(...ys), yhi = Math.max(...ys);
  const log = positive && yhi / ylo > 50;
  let ty;
  let yticks;
  if (log) {
    const a = Math.floor(Math.log10(ylo)), b = Math.ceil(Math.log10(yhi));
    ylo = Math.pow(10, a); yhi = Math.pow(10, b);
    const stride = Math.max(1, Math.ceil((b - a) / 5));
    yticks = [];
    for (let e = a; e <= b; e += stride) yticks.push(Math.pow(10, e));
    ty = (y) => T + ph - (Math.log10(y) - a) / (b - a) * ph;
  } else {
    if (source === "pulse" || ylo > 0) ylo = Math.min(0, ylo);
    if (yhi === ylo) yhi = ylo + 1;
    yticks = niceTicks(ylo, yhi, 4);
    ylo = Math.min(ylo, yticks[0]); yhi = Math.max(yhi, yticks[yticks.length - 1]);
    ty = (y) => T + ph - (y - ylo) / (yhi - ylo) * ph;
  }
  const tx = (x) => L + (x - xlo) / (xhi - xlo) * pw;
  for (const v of yticks) {
    const y = ty(v);
    el("line", { x1: L, x2: L + pw, y1: y, y2: y, class: "grid" }, svg);
    el("text", { x: L - 4, y: y + 3.5, "text-anchor": "end", class: "axis" }, svg).textContent = fmt(v, 2);
  }
  for (const v of niceTicks(xlo, xhi, Math.max(4, Math.floor(pw / 80)))) {
    const x = tx(v);
    el("line", { x1: x, x2: x, y1: T + ph, y2: T + ph + 4, class: "frame" }, svg);
    el("text", { x, y: T + ph + 14, "text-anchor": "middle", class: "axis" }, svg).textContent = fmt(v, 3);
  }
  el("text", { x: L + pw, y: H - 3, "text-anchor": "end", class: "axis-title" }, svg).textContent =
    source === "checks" ? EVENTS_AXIS : TIME_AXIS;
  el("text", { x: L, y: 11, class: "axis-title" }, svg).textContent = yTitle(h) + (log ? " · log scale" : "");
  if (source === "checks") drawMarks(svg, h, tx, xlo, xhi, T, ph);
  let points = 0;
  for (const d of data) {
    let path = "", pen = false, n = 0;
    d.x.forEach((x, i) => {
      const y = d.y[i];
      if (y === null || !isFinite(y) || (log && y <= 0)) { pen = false; return; }
      path += (pen ? "L" : "M") + tx(x).toFixed(1) + " " + ty(y).toFixed(1);
      pen = true; n += 1;
    });
    if (!n) continue;
    points += n;
    const p = el("path", { d: path, class: "series", stroke: STYLE[d.style].color,
                           "stroke-dasharray": STYLE[d.style].dash, "data-key": d.key, "data-points": n }, svg);
    el("title", {}, p).textContent = d.legend;
  }
  fig.dataset.points = String(points);
}

function drawMarks(svg, h, tx, xlo, xhi, T, ph) {
  for (const m of h.model.marks) {
    if (m.event < xlo || m.event > xhi) continue;
    const style = MARKS[m.kind];
    const x = tx(m.event);
    const g = el("g", { class: "mark", "data-kind": m.kind }, svg);
    el("line", { x1: x, x2: x, y1: T, y2: T + ph, stroke: style.color, "stroke-width": 1,
                 "stroke-dasharray": m.kind === "rollback" ? "3 2" : "1 2" }, g);
    el("text", { x, y: T + 8, "text-anchor": "middle", fill: style.color, "font-size": 10 }, g).textContent = style.glyph;
    el("title", {}, g).textContent = `${m.kind} at event ${count(m.event)}: ${m.reason}`;
  }
}

function drawAll() {
  if (!last) return;
  for (const spec of CHARTS) drawChart(document.querySelector(`figure[data-chart="${spec[0]}"]`), last, spec);
}

// ------------------------------------------------------------------ tiles, certificate, incidents
function showHealth(h) {
  const m = h.model;
  $("name").textContent = h.name;
  $("serving").textContent = m.serving === "raw" ? "Raw iterate" : "Averaged iterate";
  $("serving").dataset.iterate = m.serving;
  $("serving-why").textContent = m.serving === "raw"
    ? "the newest weights serve scores"
    : "the running average of the weights serves scores";
  const v = h.version;
  $("version").textContent = v ? `position ${count(v.seq)}` : "–";
  $("version-age").textContent = v ? `${count(v.updates)} updates · published ${ago(v.age_s)} ago` : "";
  const served = m.holdout_loss[m.serving === "raw" ? "raw" : "averaged"];
  $("loss-now").textContent = `${fmt(served)} (${m.serving})`;
  $("loss-base").textContent = `baseline ${fmt(m.holdout_loss.baseline)} · raw ${fmt(m.holdout_loss.raw)} · ` +
    `averaged ${fmt(m.holdout_loss.averaged)}` + (m.binary ? binaryWords(m.binary[m.serving]) : "");
  $("events").textContent = count(m.events);
  $("events-more").textContent = `${count(m.learned)} learned · ${count(m.held_out)} held out · ` +
    `${count(m.rejected)} rejected · ${count(m.events_since_restart)} since the last restart`;
  const rb = Object.values(m.rollbacks).reduce((a, b) => a + b, 0);
  const rs = Object.values(m.restarts).reduce((a, b) => a + b, 0);
  $("actions").textContent = `${rb} · ${rs}`;
  $("actions-more").textContent = Object.entries(m.rollbacks).filter(([, n]) => n)
    .map(([k, n]) => `${n}× ${k.replaceAll("_", " ")}`).join(" · ") || "no rollback";
  $("certificate").textContent = m.certificate.words;
  $("cert-source").textContent = m.certificate.source ? "Source: " + m.certificate.source : "";
  const warn = $("warnings");
  warn.replaceChildren();
  for (const w of m.warnings) {
    const li = document.createElement("li");
    li.textContent = w;
    warn.appendChild(li);
  }
  if (h.open_writes) {
    const li = document.createElement("li");
    li.textContent = "Writes are open to anyone who reaches this port (service.auth = \"none\").";
    warn.appendChild(li);
  }
  $("caution").textContent = h.caution;
}

function binaryWords(b) {
  return b ? ` · accuracy ${fmt(b.accuracy)} · AUC ${fmt(b.roc_auc)} · Brier ${fmt(b.brier)}` : "";
}

function showIncidents(list) {
  const ol = $("incidents");
  ol.replaceChildren();
  if (!list.length) {
    const li = document.createElement("li");
    li.dataset.kind = "none";
    li.textContent = "No incident.";
    ol.appendChild(li);
    return;
  }
  for (const inc of list.slice().reverse()) {
    const li = document.createElement("li");
    li.dataset.kind = inc.kind;
    const what = document.createElement("span");
    what.className = "what";
    const where = inc.event !== undefined && inc.event !== null ? `at event ${count(inc.event)}` : "";
    const stamp = inc.ts ? new Date(inc.ts * 1000).toISOString().replace("T", " ").slice(0, 16) + " UTC" : "";
    // the model's incidents carry their event's own time; the service's, the clock's
    const when = stamp && (inc.source === "engine" ? `event time ${stamp}` : stamp);
    what.textContent = [inc.kind.replaceAll("_", " "), where, when].filter(Boolean).join(" · ");
    const reason = document.createElement("span");
    reason.className = "reason";
    reason.textContent = inc.reason;
    li.append(what, reason);
    ol.appendChild(li);
  }
}

async function pollIncidents(h) {
  const day = $("inc-filter").value === "day";
  const query = day ? `limit=200&since=${Math.floor(h.now - 86400)}` : "limit=40";
  const body = await getJSON("/v1/incidents?" + query);
  showIncidents(body.incidents);
}

// ------------------------------------------------------------------ polling and recovery
function setConn(state, text) {
  document.body.dataset.conn = state;
  $("conn").textContent = text;
}

async function poll() {
  try {
    const h = await getJSON("/v1/health");
    const restarted = last && last.started !== h.started;
    last = h;
    lastOk = Date.now();
    lostSince = 0;
    document.body.dataset.started = String(h.started);
    showHealth(h);
    drawAll();
    await pollIncidents(h);
    setConn("live", `Live · updated ${new Date(lastOk).toLocaleTimeString("en-GB")}` +
      (restarted ? " · the service restarted and its state was recovered" : ""));
    if (firstDraw) {
      firstDraw = false;
      performance.mark("trimtab:first-draw");
      document.body.dataset.drawn = "1";
    }
  } catch (err) {
    if (err.status === 401) {
      setConn("lost", "This service needs its token to read: enter it under Operator actions.");
    } else if (err.status === 503) {
      setConn("lost", `The service is starting or recovering (${err.message}); retrying every ${RETRY_MS / 1000} s.`);
    } else {
      if (!lostSince) lostSince = Date.now();
      const since = new Date(lostSince).toLocaleTimeString("en-GB");
      setConn("lost", `Cannot reach the service since ${since}; retrying every ${RETRY_MS / 1000} s. ` +
        (lastOk ? "The charts show the last data received." : ""));
    }
  } finally {
    setTimeout(poll, document.body.dataset.conn === "live" ? POLL_MS : RETRY_MS);
  }
}

// ------------------------------------------------------------------ operator actions
async function act(path, body) {
  const out = $("ops-result");
  if (!token) { out.textContent = "Enter the token first."; return; }
  out.textContent = "Sending…";
  try {
    const r = await fetch(path, { method: "POST", cache: "no-store",
      headers: { ...headers(), "Content-Type": "application/json" }, body: JSON.stringify(body || {}) });
    const got = await r.json().catch(() => ({}));
    if (!r.ok) {
      out.textContent = `Refused (${r.status}): ${got.error ? got.error.message : "no reason given"}`;
      return;
    }
    out.textContent = path.endsWith("rollback")
      ? `Rolled back at position ${count(got.applied_seq)}; serving the ${got.serving} iterate.`
      : `Checkpoint written at position ${count(got.seq)}.`;
  } catch (err) {
    out.textContent = "The service did not answer: " + err.message;
  }
}

function wireOperator() {
  $("token").addEventListener("input", (e) => { token = e.target.value.trim(); });
  $("forget").addEventListener("click", () => { token = ""; $("token").value = ""; $("ops-result").textContent = "Token forgotten."; });
  const rb = $("do-rollback");
  rb.addEventListener("click", () => {
    if (Date.now() - armed > 5000) {
      armed = Date.now();
      rb.textContent = "Click again to roll back";
      rb.classList.add("arm");
      setTimeout(() => { if (Date.now() - armed >= 5000) { rb.textContent = "Roll back"; rb.classList.remove("arm"); } }, 5100);
      return;
    }
    armed = 0;
    rb.textContent = "Roll back";
    rb.classList.remove("arm");
    act("/v1/model/rollback", { reason: $("reason").value.trim() || "operator request from the page" });
  });
  $("do-checkpoint").addEventListener("click", () => act("/v1/checkpoints"));
  $("inc-filter").addEventListener("change", () => { if (last) pollIncidents(last).catch(() => {}); });
}

let resizeTimer = 0;
window.addEventListener("resize", () => { clearTimeout(resizeTimer); resizeTimer = setTimeout(drawAll, 150); });
buildCharts();
wireOperator();
poll();
