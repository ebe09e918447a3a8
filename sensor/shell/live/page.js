// The live page's script, inlined into the page (sensor/shell/live/page.py).
"use strict";
const SETUP = JSON.parse(document.getElementById("setup").textContent);
const P = SETUP.palette, FIELDS = SETUP.trend_fields;
const F = Object.fromEntries(FIELDS.map((n, i) => [n, i]));
const NS = "http://www.w3.org/2000/svg";  // a name, never fetched
const DIAGRAM_REACH_K = 15;  // the phase diagram shows this far around the path [K]
const state = { units: {}, help: {}, session: null, connected: false, lastData: null };

function h(tag, attrs, ...kids) {
  const e = document.createElement(tag);
  for (const [k, v] of Object.entries(attrs || {})) {
    if (v === false || v === null || v === undefined) continue;
    if (k === "text") e.textContent = v; else e.setAttribute(k, v === true ? "" : v);
  }
  for (const kid of kids) if (kid !== null && kid !== undefined) e.append(kid);
  return e;
}
function s(tag, attrs) {
  const e = document.createElementNS(NS, tag);
  for (const [k, v] of Object.entries(attrs || {})) {
    if (k === "text") e.textContent = v; else if (v !== null && v !== undefined) e.setAttribute(k, v);
  }
  return e;
}
const num = (v) => typeof v === "number" && isFinite(v);
function fmt(v, digits, unit) {
  if (!num(v)) return "—";
  return v.toFixed(digits) + (unit ? " " + unit : "");
}
function clock(t) {
  if (!num(t)) return "—";
  return new Date(t * 1000).toLocaleTimeString([], { hour12: false });
}
function duration(seconds) {
  if (seconds >= 3600) return (seconds / 3600).toFixed(seconds % 3600 ? 1 : 0) + " h";
  return Math.round(seconds / 60) + " min";
}

// --- drawing -------------------------------------------------------------------------------
function niceTicks(lo, hi, count) {
  const span = hi - lo;
  if (!(span > 0)) return [lo];
  const raw = span / count, mag = Math.pow(10, Math.floor(Math.log10(raw)));
  const step = [1, 2, 2.5, 5, 10].map((m) => m * mag).find((st) => st >= raw);
  const out = [];
  for (let t = Math.ceil(lo / step) * step; t <= hi + step * 1e-9; t += step) out.push(+t.toPrecision(12));
  return out;
}
function extent(arrays, pad) {
  let lo = Infinity, hi = -Infinity;
  for (const a of arrays) for (const v of a) if (num(v)) { lo = Math.min(lo, v); hi = Math.max(hi, v); }
  if (!isFinite(lo)) return null;
  if (hi - lo < 1e-12) { lo -= 0.5 * (Math.abs(lo) || 1) * pad; hi += 0.5 * (Math.abs(hi) || 1) * pad; }
  const m = (hi - lo) * pad;
  return [lo - m, hi + m];
}
function pathData(xs, ys, X, Y) {
  let d = "", pen = false;
  for (let i = 0; i < xs.length; i++) {
    if (num(xs[i]) && num(ys[i])) { d += (pen ? "L" : "M") + X(xs[i]).toFixed(1) + "," + Y(ys[i]).toFixed(1); pen = true; }
    else pen = false;
  }
  return d;
}
function bandData(xs, lo, hi, X, Y) {
  let d = "", run = [];
  const flush = () => {
    if (run.length > 1) {
      d += "M" + run.map((i) => X(xs[i]).toFixed(1) + "," + Y(hi[i]).toFixed(1)).join("L");
      d += "L" + run.slice().reverse().map((i) => X(xs[i]).toFixed(1) + "," + Y(lo[i]).toFixed(1)).join("L") + "Z";
    }
    run = [];
  };
  for (let i = 0; i < xs.length; i++) {
    if (num(xs[i]) && num(lo[i]) && num(hi[i])) run.push(i); else flush();
  }
  flush();
  return d;
}
// A chart: spec = {width, height, x: [lo, hi], y: [lo, hi], xlabel, ylabel, xtick, series}
function chart(spec) {
  const W = spec.width, H = spec.height, L = 58, R = 22, T = 10, B = 34;
  const svg = s("svg", { class: "chart", viewBox: `0 0 ${W} ${H}`, role: "img", "aria-label": spec.label });
  const X = (v) => L + (v - spec.x[0]) / (spec.x[1] - spec.x[0]) * (W - L - R);
  const Y = (v) => H - B - (v - spec.y[0]) / (spec.y[1] - spec.y[0]) * (H - T - B);
  for (const t of niceTicks(spec.y[0], spec.y[1], 5)) {
    svg.append(s("line", { x1: L, x2: W - R, y1: Y(t), y2: Y(t), stroke: "#E2E2E2" }));
    svg.append(s("text", { x: L - 4, y: Y(t) + 4, "text-anchor": "end", text: spec.ytick ? spec.ytick(t) : String(t) }));
  }
  for (const t of niceTicks(spec.x[0], spec.x[1], 6)) {
    svg.append(s("line", { x1: X(t), x2: X(t), y1: H - B, y2: H - B + 4, stroke: "#1A1A1A" }));
    svg.append(s("text", { x: X(t), y: H - B + 15, "text-anchor": "middle", text: spec.xtick ? spec.xtick(t) : String(t) }));
  }
  svg.append(s("rect", { x: L, y: T, width: W - L - R, height: H - T - B, fill: "none", stroke: "#1A1A1A" }));
  svg.append(s("text", { x: (L + W - R) / 2, y: H - 3, "text-anchor": "middle", text: spec.xlabel }));
  svg.append(s("text", { x: 12, y: (T + H - B) / 2, "text-anchor": "middle",
    transform: `rotate(-90 12 ${(T + H - B) / 2})`, text: spec.ylabel }));
  const clip = "clip-" + spec.id;
  const defs = s("defs"), cp = s("clipPath", { id: clip });
  cp.append(s("rect", { x: L, y: T, width: W - L - R, height: H - T - B }));
  defs.append(cp); svg.append(defs);
  const plot = s("g", { "clip-path": `url(#${clip})` });
  svg.append(plot);
  const legend = [];
  for (const se of spec.series) {
    if (se.kind === "band") {
      plot.append(s("path", { d: bandData(se.xs, se.lo, se.hi, X, Y), fill: se.color, "fill-opacity": P.band_alpha, stroke: "none" }));
    } else if (se.kind === "point") {
      if (num(se.x) && num(se.y)) {
        if (num(se.ylo) && num(se.yhi)) plot.append(s("line", { x1: X(se.x), x2: X(se.x), y1: Y(se.ylo), y2: Y(se.yhi), stroke: se.edge, "stroke-width": 1.5 }));
        plot.append(s("circle", { cx: X(se.x), cy: Y(se.y), r: 6, fill: se.face, stroke: se.edge, "stroke-width": 1.5, "data-series": se.name }));
      }
    } else {
      plot.append(s("path", { d: pathData(se.xs, se.ys, X, Y), fill: "none", stroke: se.line.color,
        "stroke-width": se.line.width * 1.3, "stroke-dasharray": se.line.dash, "data-series": se.name }));
    }
    if (se.label) legend.push(se);
  }
  let lx = L + 8, ly = T + 14;
  const lg = s("g", { class: "legend" });
  for (const se of legend) {
    const box = s("g");
    if (se.kind === "band") box.append(s("rect", { x: lx, y: ly - 8, width: 22, height: 9, fill: se.color, "fill-opacity": P.band_alpha }));
    else if (se.kind === "point") box.append(s("circle", { cx: lx + 11, cy: ly - 4, r: 4.5, fill: se.face, stroke: se.edge }));
    else box.append(s("line", { x1: lx, x2: lx + 22, y1: ly - 4, y2: ly - 4, stroke: se.line.color, "stroke-width": se.line.width * 1.3, "stroke-dasharray": se.line.dash }));
    box.append(s("text", { x: lx + 27, y: ly, text: se.label }));
    lg.append(box);
    ly += 14;
  }
  if (legend.length) {
    const back = s("rect", { x: L + 3, y: T + 2, width: 230, height: 14 * legend.length + 4, fill: "#FFFFFF", "fill-opacity": 0.85 });
    svg.append(back); svg.append(lg);
  }
  return svg;
}

// --- one unit --------------------------------------------------------------------------------
function column(rows, name) { return rows.map((r) => r[F[name]]); }
function trendRows(u) { return u.closed.concat(u.open); }

function statusWords(id, u) {
  const words = [];
  const st = u.state;
  if (!st) { words.push(["NO DATA YET: the service has not published this unit", "warn"]); return words; }
  if (st.communication_lost) words.push(["COMMUNICATION LOST: estimates are the model's forecast", "bad"]);
  if (Date.now() - u.receivedAt > SETUP.stale_after_s * 1000) words.push(["NOT UPDATING since " + clock(u.receivedAt / 1000), "bad"]);
  if (!st.has_estimate) words.push(["NO ESTIMATE YET: the soft sensor has not started", "warn"]);
  if (!st.inputs_valid) words.push(["INPUTS STALE", "warn"]);
  words.push(st.health_good ? ["HEALTH GOOD", "good"] : ["HEALTH POOR", "bad"]);
  return words;
}

function tile(name, value, more) {
  return h("div", { class: "tile" }, h("div", { class: "name", text: name }),
    h("div", { class: "value", text: value }), h("div", { class: "more", text: more || "" }));
}

function valueTiles(u) {
  const v = (u.state && u.state.values) || {};
  const two = (x) => (num(x) ? 2 * x : null);
  const sigma = v["estimates.sigma"], sd = v["estimates.sigma_std"];
  const reasons = (v["guard.reasons"] || []).concat((v["guard.limited_by"] || []).map((x) => "limited by " + x));
  return h("div", { class: "values" },
    tile("sigma (relative supersaturation)", fmt(sigma, 4), num(sd) ? "95 % band ± " + fmt(two(sd), 4) : ""),
    tile("metastable limit (sigma)", fmt(v["estimates.sigma_limit"], 4), "at the current cooling rate"),
    tile("margin to the limit", fmt(v["estimates.margin_sigma"], 4), "in sigma; " + fmt(v["estimates.margin_k"], 2, "K") + " of cooling"),
    tile("temperature", fmt(v["estimates.temp_c"], 2, "°C"), "cooling " + fmt(v["estimates.cooling_rate_k_per_min"], 3, "K/min")),
    tile("dissolved solute c", fmt(v["estimates.conc"], 4, "kg/kg"), "solubility " + fmt(v["estimates.conc_sat"], 4, "kg/kg")),
    tile("proposal", fmt(v["proposal.setpoint_c"], 2, "°C"),
      (v["proposal.mode"] || "none") + (v["proposal.reason"] ? ": " + v["proposal.reason"] : "")),
    tile("guard", (v["guard.mode"] || "—") + (v["guard.written"] ? ", written" : ""),
      "setpoint " + fmt(v["guard.setpoint_c"], 2, "°C") + (v["guard.fallback"] ? "; fallback " + v["guard.fallback"] : "") +
      (reasons.length ? "; " + reasons.join("; ") : "")),
    tile("health", v["health.health_good"] ? "good" : (u.state ? "poor" : "—"),
      "NIS " + (v["health.nis_state"] || "—") + "; analyzer " + (v["health.conc_reason"] || "—")));
}

function trendCharts(id, u) {
  const rows = trendRows(u);
  const last = rows.length ? rows[rows.length - 1][F.time_s] : null;
  const hours = rows.map((r) => (r[F.time_s] - last) / 3600);
  const xr = [-SETUP.window_s / 3600, 0];
  const sigma = column(rows, "sigma"), sd = column(rows, "sigma_std");
  const lo = sigma.map((x, i) => (num(x) && num(sd[i]) ? x - 2 * sd[i] : null));
  const hi = sigma.map((x, i) => (num(x) && num(sd[i]) ? x + 2 * sd[i] : null));
  const limit = column(rows, "sigma_limit");
  const ys = extent([lo, hi, limit, [0]], 0.08) || [-0.05, 0.1];
  const htick = (t) => (t === 0 ? "now" : t.toFixed(Math.abs(t) < 1 ? 1 : 0) + " h");
  const sig = chart({ id: id + "-sigma", label: id + ": sigma trend", width: 640, height: 230, x: xr, y: ys,
    xlabel: "hours before the latest step", ylabel: "sigma [-]", xtick: htick, series: [
      { kind: "line", xs: xr, ys: [0, 0], line: P.zero },
      { kind: "band", xs: hours, lo: lo, hi: hi, color: P.estimate.color, label: "sigma, 95 % band" },
      { kind: "line", xs: hours, ys: sigma, line: P.estimate, label: "sigma", name: "sigma" },
      { kind: "line", xs: hours, ys: limit, line: P.limit, label: "metastable limit", name: "limit" },
    ] });
  const temp = column(rows, "temp_c"), prop = column(rows, "proposal_c"), set = column(rows, "setpoint_c");
  const ts = extent([temp, prop, set], 0.08) || [0, 100];
  const tmp = chart({ id: id + "-temp", label: id + ": temperature trend", width: 640, height: 200, x: xr, y: ts,
    xlabel: "hours before the latest step", ylabel: "temperature [°C]", xtick: htick, series: [
      { kind: "line", xs: hours, ys: temp, line: P.estimate, label: "reactor (estimate)", name: "temp" },
      { kind: "line", xs: hours, ys: prop, line: P.proposal, label: "proposed setpoint", name: "proposal" },
      { kind: "line", xs: hours, ys: set, line: P.guard_setpoint, label: "setpoint after the guard", name: "setpoint" },
    ] });
  return [sig, tmp];
}

function diagramChart(id, u) {
  const d = u.diagram, rows = trendRows(u);
  const v = (u.state && u.state.values) || {};
  const trusted = d.c_sat.map((c, i) => (d.trusted[i] ? c : null));
  const extrap = d.c_sat.map((c, i) => (d.trusted[i] ? null : c));
  const path = { t: column(rows, "temp_c"), c: column(rows, "conc") };
  const cs = v["estimates.conc_std"];
  const nowLo = num(cs) ? v["estimates.conc"] - 2 * cs : null, nowHi = num(cs) ? v["estimates.conc"] + 2 * cs : null;
  // Around the path and the live point (DIAGRAM_REACH_K either side), within the curves' range.
  const full = extent([d.temp_c], 0), seen = extent([path.t, [v["estimates.temp_c"]]], 0);
  const xs = seen ? [Math.max(full[0], seen[0] - DIAGRAM_REACH_K), Math.min(full[1], seen[1] + DIAGRAM_REACH_K)] : full;
  const inside = (a) => a.map((c, i) => (d.temp_c[i] >= xs[0] && d.temp_c[i] <= xs[1] ? c : null));
  const ys = extent([inside(d.c_sat_lo), inside(d.c_sat_hi), inside(d.c_limit), path.c, [nowLo, nowHi]], 0.04);
  return chart({ id: id + "-phase", label: id + ": phase diagram", width: 520, height: 430, x: xs, y: ys,
    xlabel: "temperature [°C]", ylabel: "dissolved solute c [kg/kg solvent]", ytick: (t) => t.toPrecision(3), series: [
      { kind: "band", xs: d.temp_c, lo: d.c_sat_lo, hi: d.c_sat_hi, color: P.band_grey, label: "solubility, 95 % band" },
      { kind: "line", xs: d.temp_c, ys: trusted, line: P.solubility, label: "solubility curve" },
      { kind: "line", xs: d.temp_c, ys: extrap, line: P.solubility_extrapolated, label: "solubility, extrapolated" },
      { kind: "line", xs: d.temp_c, ys: d.c_limit, line: P.limit, label: "metastable limit at " + d.rate_k_per_min.toPrecision(2) + " K/min" },
      { kind: "line", xs: path.t, ys: path.c, line: P.estimate, label: "path, last hours", name: "path" },
      { kind: "point", x: v["estimates.temp_c"], y: v["estimates.conc"], ylo: nowLo, yhi: nowHi,
        face: P.now.face, edge: P.now.edge, label: "now (95 % band)", name: "now" },
    ] });
}

function priorityCell(priority, label) {
  const look = P.priorities[priority] || P.priorities.unranked;
  const [sym, ...word] = label.split(" ");
  return h("td", { class: "prio p-" + (P.priorities[priority] ? priority : "unranked") },
    h("span", { class: "sym", text: sym || look.symbol }), word.join(" ") || look.label);
}

function alarmTable(id, u) {
  const alarms = (u.state && u.state.alarms) || [];
  const operator = state.session && state.session.role === "operator";
  const kept = {};
  const old = document.querySelectorAll(`[data-unit="${CSS.escape(id)}"] .act input, [data-unit="${CSS.escape(id)}"] .act select`);
  for (const e of old) kept[e.name] = e.value;
  const table = h("table", { class: "alarms" },
    h("thead", {}, h("tr", {}, ...["priority", "alarm", "state", "since", "what it means", "act"].map((t) => h("th", { text: t })))));
  const body = h("tbody");
  if (!alarms.length) body.append(h("tr", {}, h("td", { colspan: 6, text: u.state ? "no alarms defined" : "no data yet" })));
  for (const a of alarms) {
    const help = (state.help[a.name] || {}).help || "";
    const act = h("div", { class: "act", "data-alarm": a.name });
    const why = operator ? null : (state.session ? "only an operator may act" : "log in as an operator to act");
    const comment = h("input", { name: a.name + ":comment", placeholder: "comment", maxlength: 200, "aria-label": "comment", disabled: !operator });
    comment.value = kept[a.name + ":comment"] || "";
    const choose = h("select", { name: a.name + ":duration", "aria-label": "shelve for", disabled: !operator });
    for (const secs of SETUP.shelve_choices_s) choose.append(h("option", { value: secs, text: duration(secs) }));
    if (kept[a.name + ":duration"]) choose.value = kept[a.name + ":duration"];
    const button = (action, text, enabled) => h("button", { type: "button", "data-action": action, disabled: !(operator && enabled), title: why || text, text: text });
    act.append(button("acknowledge", "Acknowledge", a.unacknowledged), comment,
      button("shelve", "Shelve for", !a.shelved), choose, button("unshelve", "Unshelve", a.shelved));
    const quiet = a.state === "normal" || a.state === "suppressed by design" || a.state === "out of service";
    body.append(h("tr", { class: quiet ? "quiet" : null, "data-alarm-row": a.name, "data-state": a.state },
      priorityCell(a.priority, a.label), h("td", { text: a.name }),
      h("td", { text: a.state + (a.shelved ? " until " + clock(a.shelved_until_s) : "") }),
      h("td", { text: clock(a.since_s) }),
      h("td", {}, h("details", {}, h("summary", { text: help.split("\n")[0] }), h("p", { text: help }))),
      h("td", {}, act)));
  }
  table.append(body);
  return table;
}

function eventList(u) {
  const list = h("table", { class: "events" },
    h("thead", {}, h("tr", {}, ...["time", "priority", "alarm", "event", "state", "by", "note"].map((t) => h("th", { text: t })))));
  const body = h("tbody");
  const events = u.events.slice(-10).reverse();
  if (!events.length) body.append(h("tr", {}, h("td", { colspan: 7, text: "no alarm events yet" })));
  for (const e of events) {
    body.append(h("tr", {}, h("td", { text: clock(e.time_s) }), priorityCell(e.priority, e.label),
      h("td", { text: e.alarm }), h("td", { text: e.event }), h("td", { text: e.state }),
      h("td", { text: e.user || "" }), h("td", { text: e.note || "" })));
  }
  list.append(body);
  return list;
}

function renderUnit(id) {
  const u = state.units[id];
  const section = document.querySelector(`section[data-unit="${CSS.escape(id)}"]`);
  const badges = h("div", { class: "status" });
  for (const [word, kind] of statusWords(id, u)) badges.append(h("span", { class: "badge " + kind, text: word }));
  const head = h("div", {}, h("h2", { text: id }),
    h("span", { class: "note", text: u.state ? "latest step " + clock(u.state.time_s) : "" }), badges);
  const charts = h("div", { class: "charts" }, h("div", {}, ...trendCharts(id, u)), h("div", {}, diagramChart(id, u)));
  const message = section.querySelector(".message") || h("div", { class: "message", role: "status" });
  section.replaceChildren(head, valueTiles(u), charts,
    h("h3", { text: "Alarms" }), alarmTable(id, u), message, h("h3", { text: "Latest alarm events" }), eventList(u));
}

function renderAll() {
  for (const id of SETUP.units) if (state.units[id]) renderUnit(id);
  const link = document.getElementById("link");
  link.textContent = state.connected ? "LIVE" :
    "CONNECTION TO SIGMATRACK LOST" + (state.lastData ? ": showing what came at " + clock(state.lastData / 1000) : "") + "; reconnecting";
  link.className = state.connected ? "" : "lost";
}

// --- data --------------------------------------------------------------------------------------
function trim(u) {
  const rows = trendRows(u);
  if (!rows.length) return;
  const newest = rows[rows.length - 1][F.time_s];
  u.closed = u.closed.filter((r) => r[F.time_s] >= newest - SETUP.window_s).slice(-SETUP.max_rows);
}
function onSnapshot(data) {
  state.help = data.alarm_help;
  for (const id of SETUP.units) {
    const d = data.units[id];
    if (!d) continue;  // a server restarted with other units: this page shows the old list
    state.units[id] = { state: d.state, events: d.events, closed: d.trend, open: [],
      diagram: data.diagrams[d.diagram], receivedAt: Date.now() };
  }
  state.lastData = Date.now();
  renderAll();
}
function onUnit(data) {
  const u = state.units[data.unit];
  if (!u) return;
  u.state = data.state;
  u.events = u.events.concat(data.events).slice(-SETUP.events_kept);
  u.closed = u.closed.concat(data.closed);
  u.open = data.open;
  u.receivedAt = state.lastData = Date.now();
  trim(u);
  renderUnit(data.unit);
}
function onEvents(data) {
  const u = state.units[data.unit];
  if (!u) return;
  u.events = u.events.concat(data.events).slice(-SETUP.events_kept);
  renderUnit(data.unit);
}
function connect() {
  const source = new EventSource("/events");
  source.addEventListener("open", () => { state.connected = true; renderAll(); });
  source.addEventListener("error", () => { state.connected = false; renderAll(); });
  source.addEventListener("snapshot", (e) => { state.connected = true; onSnapshot(JSON.parse(e.data)); });
  source.addEventListener("unit", (e) => onUnit(JSON.parse(e.data)));
  source.addEventListener("events", (e) => onEvents(JSON.parse(e.data)));
}

// --- login and actions -------------------------------------------------------------------------
function renderLogin() {
  const box = document.getElementById("login");
  if (!SETUP.login) { box.replaceChildren(h("span", { class: "note", text: "view only (no users file)" })); return; }
  if (state.session) {
    const out = h("button", { type: "button", id: "logout", text: "Log out" });
    out.addEventListener("click", logout);
    box.replaceChildren(h("span", { id: "who", text: "logged in: " + state.session.user + " (" + state.session.role + ")" }), out);
    return;
  }
  const form = h("form", { id: "login-form" },
    h("input", { name: "user", placeholder: "user", autocomplete: "username", required: true, "aria-label": "user" }), " ",
    h("input", { name: "password", type: "password", placeholder: "password", autocomplete: "current-password", required: true, "aria-label": "password" }), " ",
    h("button", { type: "submit", text: "Log in" }), " ", h("span", { id: "login-message", class: "note" }));
  form.addEventListener("submit", login);
  box.replaceChildren(form);
}
async function post(url, body, csrf) {
  const headers = { "Content-Type": "application/json" };
  if (csrf) headers["X-CSRF-Token"] = csrf;
  const response = await fetch(url, { method: "POST", headers, body: JSON.stringify(body), credentials: "same-origin" });
  let data = {};
  try { data = await response.json(); } catch (e) { data = { error: response.statusText }; }
  return [response.ok, data];
}
async function login(event) {
  event.preventDefault();
  const form = event.target;
  const [ok, data] = await post("/login", { user: form.user.value, password: form.password.value });
  form.password.value = "";
  if (!ok) { document.getElementById("login-message").textContent = data.error; return; }
  state.session = data;
  renderLogin(); renderAll();
}
async function logout() {
  await post("/logout", {}, state.session && state.session.csrf);
  state.session = null;
  renderLogin(); renderAll();
}
async function act(event) {
  const button = event.target.closest("button[data-action]");
  if (!button || !state.session) return;
  const box = button.closest(".act"), section = button.closest("section[data-unit]");
  const unit = section.dataset.unit, alarm = box.dataset.alarm, action = button.dataset.action;
  const body = { comment: box.querySelector("input").value };
  if (action === "shelve") body.duration_s = Number(box.querySelector("select").value);
  const [ok, data] = await post(`/alarms/${encodeURIComponent(unit)}/${encodeURIComponent(alarm)}/${action}`, body, state.session.csrf);
  // The table may have been drawn again meanwhile (the action's events came by the stream).
  const current = section.querySelector(`input[name="${CSS.escape(alarm + ":comment")}"]`);
  if (ok && current) current.value = "";
  section.querySelector(".message").textContent = ok
    ? `${alarm}: ${action} done by ${state.session.user}` : `${alarm}: ${action} refused: ${data.error}`;
  if (!ok && data.error && data.error.startsWith("log in")) { state.session = null; renderLogin(); }
}

async function start() {
  const main = document.querySelector("main");
  for (const id of SETUP.units) {
    const section = h("section", { class: "unit", "data-unit": id }, h("h2", { text: id }), h("span", { class: "badge warn", text: "CONNECTING" }));
    main.append(section);
  }
  main.addEventListener("click", act);
  if (SETUP.login) {
    const response = await fetch("/session", { credentials: "same-origin" });
    if (response.ok) state.session = await response.json();
  }
  renderLogin();
  connect();
  setInterval(renderAll, 5000);
}
start();
