// calibrate review page. Every number plotted comes from the server's replay (JSON);
// this script only arranges it. Text from data is set with textContent, or escaped (esc)
// where the queue is built as HTML, and escaped before it reaches Plotly, whose labels
// accept a few HTML tags.
"use strict";

const TOKEN = document.querySelector('meta[name="review-token"]').content;
const $ = (id) => document.getElementById(id);
const S = {
  meta: null, q: null, index: new Map(), order: [], pos: new Map(), current: null, view: "alert",
  shown: null, selecting: false, plots: [], syncing: false, browseLevel: null,
};

async function call(method, path, body) {
  const res = await fetch(path, {
    method,
    headers: { "X-Review-Token": TOKEN, "Content-Type": "application/json" },
    body: body === undefined ? undefined : JSON.stringify(body),
  });
  let data = null;
  try { data = await res.json(); } catch (e) { data = { error: res.statusText }; }
  if (!res.ok) throw new Error((data && data.error) || res.statusText);
  return data;
}

function el(tag, cls, text) {
  const e = document.createElement(tag);
  if (cls) e.className = cls;
  if (text !== undefined && text !== null) e.textContent = String(text);
  return e;
}

function plotText(s) {
  return String(s).replace(/&/g, "&amp;").replace(/</g, "&lt;").replace(/>/g, "&gt;");
}

let toastTimer = null;
function toast(msg, bad) {
  const t = $("toast");
  t.textContent = msg;
  t.className = "show" + (bad ? " bad" : "");
  clearTimeout(toastTimer);
  toastTimer = setTimeout(() => { t.className = ""; }, bad ? 5000 : 1800);
}

const fmt = (x, d = 3) => (x === null || x === undefined ? "n/a" : Number(x).toPrecision(d));
const pct = (x) => (x === null || x === undefined ? "n/a" : (100 * x).toFixed(0) + "%");
const hourText = (iso) => iso.replace("T", " ").replace(":00:00Z", ":00");
function hourAt(i) {
  const h = S.meta.hours;
  return i < h.length ? h[i] : S.meta.end_hour;
}

// ------------------------------------------------------------------ queue

function fillSelect(sel, values, allLabel) {
  sel.replaceChildren();
  const all = el("option", null, allLabel);
  all.value = "";
  sel.append(all);
  for (const v of values) {
    const o = el("option", null, v);
    o.value = v;
    sel.append(o);
  }
}

function uniq(values) { return [...new Set(values)].sort(); }

function setupFilters() {
  const q = S.q;
  fillSelect($("f-team"), uniq(q.team), "all teams");
  fillSelect($("f-level"), uniq(q.level), "all levels");
  fillSelect($("f-metric"), uniq(q.metric), "all metrics");
  fillSelect($("f-detector"), uniq(q.detectors.flatMap((d) => d.split("+")).filter(Boolean)),
             "any detector");
  for (const id of ["f-team", "f-level", "f-metric", "f-detector", "f-status", "f-order"]) {
    $(id).addEventListener("change", () => renderQueue(true));
  }
}

function passes(i) {
  const q = S.q;
  const team = $("f-team").value, level = $("f-level").value, metric = $("f-metric").value;
  const det = $("f-detector").value, status = $("f-status").value;
  if (team && q.team[i] !== team) return false;
  if (level && q.level[i] !== level) return false;
  if (metric && q.metric[i] !== metric) return false;
  if (det && !q.detectors[i].split("+").includes(det)) return false;
  const v = q.verdict[i];
  if (status === "open" && v) return false;
  if (status === "done" && !v) return false;
  if (["real", "false", "duplicate"].includes(status) && v !== status) return false;
  return true;
}

// teams by name; within a team, series by their largest alert; alerts by size of impact
// (|impact| as a share of the expected value, comparable across metrics) or newest first
function arrange(rows) {
  const q = S.q;
  const byRaised = $("f-order").value === "raised";
  const size = (i) => (q.impact_share[i] === null ? Infinity : q.impact_share[i]);
  const key = (i) => (byRaised ? q.raised_hour[i] : size(i));
  const teams = new Map();
  for (const i of rows) {
    const t = q.team[i];
    if (!teams.has(t)) teams.set(t, new Map());
    const g = q.level[i] + "\u0000" + q.series[i];
    const groups = teams.get(t);
    if (!groups.has(g)) groups.set(g, []);
    groups.get(g).push(i);
  }
  const cmp = (a, b) => (key(a) < key(b) ? 1 : key(a) > key(b) ? -1 : a - b);
  const out = [];
  for (const t of [...teams.keys()].sort()) {
    const groups = [...teams.get(t).values()];
    for (const g of groups) g.sort(cmp);
    groups.sort((a, b) => cmp(a[0], b[0]));
    out.push([t, groups]);
  }
  return out;
}

// the queue is built as one HTML string (every data string through esc), which is
// several times faster than creating 10,000 rows node by node
const ESC = { "&": "&amp;", "<": "&lt;", ">": "&gt;", '"': "&quot;", "'": "&#39;" };
const esc = (s) => String(s).replace(/[&<>"']/g, (c) => ESC[c]);

function rowHtml(i) {
  const q = S.q;
  const size = q.impact_share[i] === null ? fmt(q.impact[i])
    : (q.impact[i] < 0 ? "\u2212" : "+") + pct(q.impact_share[i]);
  const when = q.raised_hour[i].slice(5, 16).replace("T", " ");
  return `<div class="alert-row" role="listitem" data-alert-id="${esc(q.alert_id[i])}" ` +
    `data-verdict="${esc(q.verdict[i])}"><span class="dot"></span>` +
    `<span class="what">${esc(q.metric[i])} · ${esc(when)}</span>` +
    `<span class="size">${esc(size)}</span>` +
    `<span class="tag">${esc(q.verdict[i] || q.detectors[i])}</span></div>`;
}

function renderQueue(keepCurrent) {
  const q = S.q;
  const rows = [];
  for (let i = 0; i < q.alert_id.length; i++) if (passes(i)) rows.push(i);
  const html = [];
  S.order = [];
  S.pos = new Map();
  for (const [team, groups] of arrange(rows)) {
    const n = groups.reduce((a, g) => a + g.length, 0);
    html.push(`<section class="team"><h3>${esc(team || "(no team)")} · ${n} alert${n === 1 ? "" : "s"}</h3>`);
    for (const g of groups) {
      html.push(`<div class="group"><div class="group-head"><b>${esc(q.series[g[0]])}</b> · ` +
                `${esc(q.level[g[0]])}</div>`);
      for (const i of g) {
        S.pos.set(q.alert_id[i], S.order.length);
        S.order.push(i);
        html.push(rowHtml(i));
      }
      html.push("</div>");
    }
    html.push("</section>");
  }
  $("queue").innerHTML = html.join("");
  $("queue-count").textContent = `${S.order.length} alert${S.order.length === 1 ? "" : "s"} in this view`;
  if (keepCurrent && S.current !== null) markCurrent(S.q.alert_id[S.current], false);
}

function rowOf(alertId) {
  return $("queue").querySelector(`.alert-row[data-alert-id="${CSS.escape(alertId)}"]`);
}

function markCurrent(alertId, scroll) {
  for (const r of $("queue").querySelectorAll(".alert-row.current")) r.classList.remove("current");
  const r = rowOf(alertId);
  if (r) {
    r.classList.add("current");
    if (scroll) r.scrollIntoView({ block: "nearest" });
  }
}

function updateProgress(p) {
  $("progress-text").textContent = `${p.reviewed} of ${p.total} reviewed`;
  $("progress-bar").max = Math.max(p.total, 1);
  $("progress-bar").value = p.reviewed;
}

// ------------------------------------------------------------------ detail

async function openAlert(i, scroll = true) {
  S.current = i;
  const id = S.q.alert_id[i];
  markCurrent(id, scroll);
  showTab("alert");
  let d;
  try {
    d = await call("GET", `/api/alerts/${encodeURIComponent(id)}`);
  } catch (e) { toast(e.message, true); return; }
  if (S.current !== i) return; // a later click won
  S.shown = d;
  const a = d.alert;
  $("d-title").textContent = `${d.label} · ${d.metric}`;
  facts([["alert", a.alert_id], ["level", d.level], ["team", a.team || "(none)"],
         ["start", hourText(a.start)], ["raised", hourText(a.raised_hour)],
         ["end", hourText(a.end)], ["peak fence score", fmt(a.peak_score)],
         ["value", fmt(a.value, 5)], ["expected", fmt(a.expected, 5)],
         ["impact", fmt(a.impact, 4)], ["detectors", a.detectors]]);
  $("verdict-bar").hidden = false;
  $("comment").value = a.comment || "";
  showVerdict(a.verdict);
  await draw(d, a);
  if (S.shown === d) document.body.dataset.shown = a.alert_id; // plots drawn
}

function facts(pairs) {
  const dl = $("d-facts");
  dl.replaceChildren();
  for (const [k, v] of pairs) {
    const div = el("div");
    div.append(el("dt", null, k), el("dd", null, v));
    dl.append(div);
  }
}

function showVerdict(v) {
  for (const b of document.querySelectorAll("#verdict-bar .v[data-verdict]")) {
    b.setAttribute("aria-pressed", b.dataset.verdict === v ? "true" : "false");
  }
  $("verdict-now").textContent = v ? `saved: ${v}` : "not reviewed";
}

async function giveVerdict(v, advance = true) {
  if (S.current === null || S.view !== "alert") return;
  const i = S.current, id = S.q.alert_id[i];
  let res;
  try {
    res = await call("POST", `/api/alerts/${encodeURIComponent(id)}/verdict`,
                     { verdict: v, comment: $("comment").value });
  } catch (e) { toast(e.message, true); return; }
  S.q.verdict[i] = res.verdict;
  S.q.comment[i] = res.comment;
  updateProgress(res.progress);
  const r = rowOf(id);
  if (r) {
    r.dataset.verdict = res.verdict;
    r.querySelector(".tag").textContent = res.verdict || S.q.detectors[i];
  }
  if (S.current === i) showVerdict(res.verdict);
  toast(`${id}: ${res.verdict || "cleared"} (saved)`);
  if (advance && res.verdict) nextOpen();
}

function step(delta) {
  if (!S.order.length) return;
  let at = S.current === null ? -1 : S.pos.get(S.q.alert_id[S.current]);
  if (at === undefined) at = -1;
  const next = Math.min(Math.max(at + delta, 0), S.order.length - 1);
  if (next !== at) openAlert(S.order[next]);
}

function nextOpen() {
  const at = S.current === null ? -1 : (S.pos.get(S.q.alert_id[S.current]) ?? -1);
  for (let k = 1; k <= S.order.length; k++) {
    const i = S.order[(at + k) % S.order.length];
    if (!S.q.verdict[i]) { openAlert(i); return; }
  }
  toast("every alert in this view is reviewed");
}

// ------------------------------------------------------------------ plots

const COLORS = { value: "#1d2330", expected: "#2f7d5b", band: "rgba(47,125,91,0.13)",
                 flagged: "#b3361b", episode: "rgba(31,95,191,0.16)", raised: "#1f5fbf",
                 incident: "rgba(201,162,39,0.28)", added: "rgba(201,110,39,0.35)",
                 other: { "": "#9aa3b5", real: "#b3361b", false: "#4d6b8a", duplicate: "#7a5a9c" } };

function traces(t) {
  const x = S.meta.hours;
  const out = [];
  if (t.watched) {
    out.push({ x, y: t.upper, name: "upper fence", mode: "lines", line: { width: 0 },
               hoverinfo: "skip", showlegend: false });
    out.push({ x, y: t.lower, name: `fences (k = ${fmt(t.multiplier)})`, mode: "lines",
               line: { width: 0 }, fill: "tonexty", fillcolor: COLORS.band, hoverinfo: "skip" });
    out.push({ x, y: t.expected, name: "expected", mode: "lines",
               line: { color: COLORS.expected, width: 1.3, dash: "dot" } });
  }
  out.push({ x, y: t.value, name: plotText(t.metric), meta: "value", mode: "lines",
             line: { color: COLORS.value, width: 1.4 } });
  if (t.watched && t.flagged.length) {
    out.push({ x: t.flagged.map((i) => x[i]), y: t.flagged.map((i) => t.value[i]),
               name: "flagged hours", mode: "markers", hoverinfo: "skip",
               marker: { color: COLORS.flagged, size: 4 } });
  }
  return out;
}

function shapes(d, metric, alert) {
  const sh = [], notes = [];
  for (const inc of d.incidents) {
    if (inc.metric && inc.metric !== metric) continue;
    sh.push({ type: "rect", xref: "x", yref: "paper", x0: hourAt(inc.start), x1: hourAt(inc.end),
              y0: 0, y1: 1, line: { width: 0 }, layer: "below",
              fillcolor: inc.added ? COLORS.added : COLORS.incident });
    notes.push({ x: hourAt(inc.start), y: 1, xref: "x", yref: "paper", yanchor: "bottom",
                 showarrow: false, font: { size: 10, color: "#7a5d00" },
                 text: plotText(`${inc.added ? "added " : "incident "}${inc.incident_id}`) });
  }
  if (metric === d.metric) {
    for (const o of d.alerts) {
      if (alert && o.alert_id === alert.alert_id) continue;
      sh.push({ type: "rect", xref: "x", yref: "paper", x0: hourAt(o.start), x1: hourAt(o.end),
                y0: 0, y1: 0.035, line: { width: 0 }, fillcolor: COLORS.other[o.verdict] });
    }
  }
  if (alert) {
    sh.push({ type: "rect", xref: "x", yref: "paper", x0: hourAt(alert.start_index),
              x1: hourAt(alert.end_index), y0: 0, y1: 1, line: { width: 0 },
              fillcolor: COLORS.episode, layer: "below" });
    sh.push({ type: "line", xref: "x", yref: "paper", x0: hourAt(alert.raised_index),
              x1: hourAt(alert.raised_index), y0: 0, y1: 1,
              line: { color: COLORS.raised, width: 1.5, dash: "dash" } });
  }
  return [sh, notes];
}

function initialRange(alert) {
  const h = S.meta.hours;
  if (!alert) return [h[Math.max(0, h.length - 24 * 14)], S.meta.end_hour];
  const lo = Math.max(0, alert.start_index - 24 * 4), hi = Math.min(h.length, alert.end_index + 24 * 2);
  return [h[lo], hourAt(hi)];
}

function layoutFor(d, metric, alert, main, range) {
  const [sh, notes] = shapes(d, metric, alert);
  return {
    margin: { l: 60, r: 12, t: main ? 26 : 20, b: main ? 30 : 22 },
    xaxis: { type: "date", range, rangeslider: main ? { visible: true, thickness: 0.07 } : undefined },
    yaxis: { title: { text: plotText(metric), font: { size: 11 } }, automargin: true },
    showlegend: main, legend: { orientation: "h", y: 1.12, x: 0, font: { size: 11 } },
    hovermode: "x unified", dragmode: S.selecting ? "select" : "zoom", selectdirection: "h",
    shapes: sh, annotations: notes, uirevision: "keep",
    paper_bgcolor: "rgba(0,0,0,0)", plot_bgcolor: "#ffffff",
  };
}

const PLOT_CONFIG = { displaylogo: false, responsive: true,
                      modeBarButtonsToRemove: ["lasso2d", "autoScale2d"] };

// Plotly (4-5 MB) is fetched once the queue is on screen, so that compiling it does not
// hold up the queue; plots wait for it
let plotlyLoaded = null;
function loadPlotly() {
  if (!plotlyLoaded) {
    plotlyLoaded = new Promise((resolve, reject) => {
      const tag = document.createElement("script");
      tag.src = `/static/plotly.min.js?token=${encodeURIComponent(TOKEN)}`;
      tag.addEventListener("load", () => resolve());
      tag.addEventListener("error", () => reject(new Error("the plotting script did not load")));
      document.head.append(tag);
    });
  }
  return plotlyLoaded;
}

async function draw(d, alert) {
  try { await loadPlotly(); } catch (e) { toast(e.message, true); return; }
  if (S.shown !== d) return; // another alert or series was opened meanwhile
  for (const p of S.plots) Plotly.purge(p);
  S.plots = [];
  const range = initialRange(alert);
  const main = $("plot-main");
  Plotly.newPlot(main, traces(d.main), layoutFor(d, d.metric, alert, true, range), PLOT_CONFIG);
  main.dataset.metric = d.metric;
  S.plots.push(main);
  const rel = $("plot-related");
  rel.replaceChildren();
  for (const t of d.related) {
    const div = el("div", "plot");
    div.dataset.metric = t.metric;
    rel.append(div);
    Plotly.newPlot(div, traces(t), layoutFor(d, t.metric, alert, false, range), PLOT_CONFIG);
    S.plots.push(div);
  }
  for (const p of S.plots) {
    p.on("plotly_relayout", (ev) => linkX(p, ev));
    p.on("plotly_selected", (ev) => selected(p, ev));
  }
}

// zooming or panning one plot moves the others to the same hours
function linkX(src, ev) {
  if (S.syncing) return;
  let upd = null;
  if (ev["xaxis.range[0]"] !== undefined) upd = { "xaxis.range": [ev["xaxis.range[0]"], ev["xaxis.range[1]"]] };
  else if (ev["xaxis.range"]) upd = { "xaxis.range": ev["xaxis.range"] };
  else if (ev["xaxis.autorange"]) upd = { "xaxis.autorange": true };
  if (!upd) return;
  S.syncing = true;
  Promise.all(S.plots.filter((p) => p !== src).map((p) => Plotly.relayout(p, upd)))
    .finally(() => { S.syncing = false; });
}

function setSelecting(on) {
  S.selecting = on;
  $("select-range").setAttribute("aria-pressed", on ? "true" : "false");
  $("select-hint").hidden = !on;
  for (const p of S.plots) Plotly.relayout(p, { dragmode: on ? "select" : "zoom" });
}

// the selected time span, widened to whole hours of the grid (start inclusive, end exclusive)
function selected(plot, ev) {
  if (!ev || !ev.range || !ev.range.x) return;
  const t0 = Date.parse(S.meta.hours[0]);
  const n = S.meta.hours.length;
  const at = (s) => (Date.parse(String(s).replace(" ", "T") + "Z") - t0) / 3600000;
  const lo = Math.min(Math.max(0, Math.floor(at(ev.range.x[0]))), n - 1);
  const hi = Math.max(Math.min(n, Math.ceil(at(ev.range.x[1]))), lo + 1);
  if (!Number.isFinite(lo) || !Number.isFinite(hi)) return;
  openIncidentForm(plot.dataset.metric, S.meta.hours[lo], hourAt(hi));
  setSelecting(false);
  Plotly.relayout(plot, { selections: [] });
}

// ------------------------------------------------------------------ incidents

function openIncidentForm(metric, start, end) {
  const d = S.shown;
  if (!d) return;
  if (!S.meta.incidents_file) {
    toast("adding incidents needs --incidents-out: restart calibrate review with it", true);
    return;
  }
  const f = $("incident-form");
  f.dataset.level = d.level;
  f.dataset.keys = JSON.stringify(d.keys);
  $("inc-series").textContent = `${d.level}: ${d.label}`;
  const sel = $("inc-metric");
  sel.replaceChildren();
  const watched = S.meta.watched.includes(metric) ? [metric] : [];
  for (const m of [...watched, ...S.meta.watched.filter((w) => w !== metric)]) {
    const o = el("option", null, m);
    o.value = m;
    sel.append(o);
  }
  const any = el("option", null, "any metric");
  any.value = "";
  sel.append(any);
  $("inc-start").value = start;
  $("inc-end").value = end;
  $("inc-note").value = "";
  $("inc-file").textContent = `saved to ${S.meta.incidents_file}`;
  f.hidden = false;
  $("inc-note").focus();
}

async function saveIncident(e) {
  e.preventDefault();
  const f = $("incident-form");
  const body = { level: f.dataset.level, keys: JSON.parse(f.dataset.keys),
                 metric: $("inc-metric").value, start: $("inc-start").value.trim(),
                 end: $("inc-end").value.trim(), note: $("inc-note").value };
  let res;
  try { res = await call("POST", "/api/incidents", body); } catch (err) { toast(err.message, true); return; }
  f.hidden = true;
  S.meta.added = res.added;
  renderAdded();
  toast(`incident ${res.incident.incident_id} added`);
  await redraw();
}

async function deleteIncident(id) {
  let res;
  try { res = await call("DELETE", `/api/incidents/${encodeURIComponent(id)}`); } catch (err) { toast(err.message, true); return; }
  S.meta.added = res.added;
  renderAdded();
  toast(`incident ${id} removed`);
  await redraw();
}

function renderAdded() {
  const ul = $("added-list");
  ul.replaceChildren();
  $("added").hidden = !S.meta.incidents_file;
  for (const r of S.meta.added) {
    const keys = S.meta.levels[r.level].map((c) => r[c]).join(" / ");
    const li = el("li", null, `${r.incident_id}: ${r.level} ${keys} · ${r.metric || "any metric"} · ` +
                              `${hourText(r.start)} to ${hourText(r.end)}${r.note ? " · " + r.note : ""}`);
    li.dataset.incidentId = r.incident_id;
    const b = el("button", null, "remove");
    b.type = "button";
    b.addEventListener("click", () => deleteIncident(r.incident_id));
    li.append(b);
    ul.append(li);
  }
  if (!S.meta.added.length) ul.append(el("li", "muted", "none yet"));
}

async function redraw() {
  if (S.view === "alert" && S.current !== null) return openAlert(S.current, false);
  if (S.shown) return openSeries(S.shown.level, S.shown.keys, S.shown.metric);
}

// ------------------------------------------------------------------ series browser

function showTab(which) {
  S.view = which;
  $("tab-alert").classList.toggle("on", which === "alert");
  $("tab-browse").classList.toggle("on", which === "browse");
  $("browse").hidden = which !== "browse";
  $("verdict-bar").hidden = which !== "alert" || S.current === null;
}

async function loadSeriesList(level) {
  S.browseLevel = await call("GET", `/api/series-list?level=${encodeURIComponent(level)}`);
  renderSeriesList();
}

function renderSeriesList() {
  const L = S.browseLevel;
  if (!L) return;
  const words = $("b-filter").value.toLowerCase().split(/\s*\/\s*|\s+/).filter(Boolean);
  const box = $("b-list");
  const frag = document.createDocumentFragment();
  let shown = 0, matched = 0;
  for (let i = 0; i < L.keys.length; i++) {
    const label = L.keys[i].join(" / ");
    const low = label.toLowerCase();
    if (!words.every((w) => low.includes(w))) continue;
    matched++;
    if (shown >= 300) continue;
    shown++;
    const r = el("div", "series-row");
    r.setAttribute("role", "listitem");
    r.append(el("span", null, label), el("span", "muted", L.alerts[i] ? `${L.alerts[i]} alerts` : ""));
    const keys = Object.fromEntries(L.key_columns.map((c, j) => [c, L.keys[i][j]]));
    r.addEventListener("click", () => openSeries(L.level, keys, $("b-metric").value));
    frag.append(r);
  }
  if (matched > shown) frag.append(el("div", "muted", `${matched - shown} more: type to narrow`));
  box.replaceChildren(frag);
}

async function openSeries(level, keys, metric) {
  const qs = new URLSearchParams({ level, metric, ...keys });
  let d;
  try { d = await call("GET", `/api/series?${qs}`); } catch (e) { toast(e.message, true); return; }
  S.shown = d;
  S.current = null;
  markCurrent("", false);
  showTab("browse");
  $("d-title").textContent = `${d.label} · ${d.metric}`;
  facts([["level", d.level], ["alerts of this metric", d.alerts.length],
         ["incidents", d.incidents.length],
         ["plotted", d.main.watched ? "value, expected value, fences" : "value (not a watched metric)"]]);
  await draw(d, null);
}

function browseCurrent() {
  showTab("browse");
  const d = S.shown;
  if (!d) {
    loadSeriesList($("b-level").value).catch((e) => toast(e.message, true));
  } else {
    $("b-level").value = d.level;
    $("b-metric").value = d.metric;
    loadSeriesList(d.level).then(() => {
      $("b-filter").value = d.label;
      renderSeriesList();
    }).catch((e) => toast(e.message, true));
  }
}

// ------------------------------------------------------------------ keys and start

function typing(e) {
  const t = e.target;
  return t && (t.tagName === "INPUT" || t.tagName === "TEXTAREA" || t.tagName === "SELECT");
}

function onKey(e) {
  if (e.ctrlKey || e.metaKey || e.altKey) return;
  if (e.key === "Escape") {
    if (typing(e)) e.target.blur();
    if (S.selecting) setSelecting(false);
    $("incident-form").hidden = true;
    $("help").hidden = true;
    return;
  }
  if (typing(e)) return;
  const k = e.key;
  const map = { r: "real", f: "false", d: "duplicate" };
  if (map[k]) giveVerdict(map[k]);
  else if (k === "u") giveVerdict("", false);
  else if (k === "j" || k === "ArrowDown") step(1);
  else if (k === "k" || k === "ArrowUp") step(-1);
  else if (k === "n") nextOpen();
  else if (k === "c") { if (S.view === "alert" && S.current !== null) $("comment").focus(); }
  else if (k === "i") setSelecting(!S.selecting);
  else if (k === "a") { if (S.current !== null) openAlert(S.current); else showTab("alert"); }
  else if (k === "b") browseCurrent();
  else if (k === "?") $("help").hidden = !$("help").hidden;
  else return;
  e.preventDefault();
}

async function start() {
  try {
    [S.meta, S.q] = await Promise.all([call("GET", "/api/meta"), call("GET", "/api/alerts")]);
  } catch (e) { toast(e.message, true); return; }
  S.index = new Map(S.q.alert_id.map((id, i) => [id, i]));
  updateProgress(S.meta.progress);
  setupFilters();
  renderQueue(false);
  // marked once the browser has laid out and painted the queue (the next frame)
  await new Promise((resolve) => requestAnimationFrame(() => setTimeout(resolve, 0)));
  document.body.dataset.queueReady = "1";
  loadPlotly();
  $("queue").addEventListener("click", (e) => {
    const r = e.target.closest(".alert-row");
    if (r) openAlert(S.index.get(r.dataset.alertId), false);
  });
  for (const b of document.querySelectorAll("#verdict-bar .v")) {
    b.addEventListener("click", () => giveVerdict(b.dataset.clear ? "" : b.dataset.verdict, !b.dataset.clear));
  }
  $("comment").addEventListener("keydown", (e) => {
    if (e.key === "Enter") { e.preventDefault(); giveVerdict(S.q.verdict[S.current] || "", false); }
  });
  $("select-range").addEventListener("click", () => setSelecting(!S.selecting));
  $("incident-form").addEventListener("submit", saveIncident);
  $("inc-cancel").addEventListener("click", () => { $("incident-form").hidden = true; });
  $("tab-alert").addEventListener("click", () => { if (S.current !== null) openAlert(S.current); else showTab("alert"); });
  $("tab-browse").addEventListener("click", browseCurrent);
  $("help-button").addEventListener("click", () => { $("help").hidden = !$("help").hidden; });
  $("help-close").addEventListener("click", () => { $("help").hidden = true; });
  const lv = $("b-level"), bm = $("b-metric");
  for (const name of Object.keys(S.meta.levels)) { const o = el("option", null, name); o.value = name; lv.append(o); }
  for (const m of S.meta.metrics) { const o = el("option", null, m); o.value = m; bm.append(o); }
  lv.addEventListener("change", () => loadSeriesList(lv.value).catch((e) => toast(e.message, true)));
  $("b-filter").addEventListener("input", renderSeriesList);
  bm.addEventListener("change", () => { if (S.shown && S.view === "browse") openSeries(S.shown.level, S.shown.keys, bm.value); });
  document.addEventListener("keydown", onKey);
  renderAdded();
  if (S.order.length) await openAlert(S.order[0]);
  else if (S.q.alert_id.length) toast("every alert in this view is reviewed");
  document.body.dataset.ready = "1";
}

document.addEventListener("DOMContentLoaded", start);
