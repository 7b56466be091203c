// pycnoctl dashboard: plain JS, no build step, no external assets.
// Reads /api/status once, then follows /api/events (server-sent events); draws the trace on a canvas
// and the gas system as SVG from the instrument description the daemon sends.
"use strict";

const $ = (id) => document.getElementById(id);
const SVGNS = "http://www.w3.org/2000/svg";
const WINDOW_S = 300;          // seconds of instrument time on the trace
const MAX_POINTS = 4000;       // decimated points kept in the browser

const view = { status: null, t: [], p: [], states: [], desc: null, details: {}, lastRuns: 0 };

function fmtBar(pa, digits = 4) {
  if (pa === null || pa === undefined) return "--";
  const v = pa / 1e5;
  return (Math.abs(v) < 0.5 * 10 ** -digits ? 0 : v).toFixed(digits);  // no "-0.0000"
}
function esc(s) { return String(s ?? "").replace(/[&<>"']/g, (c) => ({ "&": "&amp;", "<": "&lt;", ">": "&gt;", '"': "&quot;", "'": "&#39;" }[c])); }
function pm(v, u, d) { return v === null || v === undefined ? "–" : `${v.toFixed(d)} ± ${(u ?? 0).toFixed(d)}`; }

async function api(method, path, body) {
  const opt = { method, headers: {}, credentials: "same-origin" };
  if (body !== undefined) { opt.headers["content-type"] = "application/json"; opt.body = JSON.stringify(body); }
  const r = await fetch(path, opt);
  let data = null;
  try { data = await r.json(); } catch (e) { data = null; }
  if (!r.ok) { const err = new Error((data && data.error) || r.statusText); err.data = data; err.status = r.status; throw err; }
  return data;
}

let sayTimer = null;
function say(text, ok) {  // a confirmation clears itself; an error stays until the next action
  const m = $("msg"); m.textContent = text; m.className = "msg " + (ok ? "ok" : "err");
  clearTimeout(sayTimer);
  if (ok) sayTimer = setTimeout(() => { if (m.textContent === text) { m.textContent = ""; m.className = "msg"; } }, 6000);
}

// Pressures in messages from the daemon are in Pa (SI); people read bar here, as on the trace.
function inBar(text) {
  return String(text ?? "")
    .replace(/(-?\d+(?:\.\d+)?(?:e[+-]?\d+)?) Pa\/s/g, (m, v) => `${(Number(v) / 100).toPrecision(4)} mbar/s`)
    .replace(/(-?\d+(?:\.\d+)?(?:e[+-]?\d+)?) Pa\b/g, (m, v) => `${fmtBar(Number(v), 4)} bar`);
}

function calText(cal) {
  if (!cal) return "–";
  if (cal.uncalibrated) return `UNCALIBRATED: nominal volumes` + (cal.nominal_u ? ` (±${(100 * cal.nominal_u).toPrecision(2)} %, k = 1)` : "");
  const age = cal.age_days == null ? "" : cal.age_days < 1 ? `, ${(24 * cal.age_days).toFixed(1)} h old` : `, ${cal.age_days.toFixed(1)} days old`;
  return `${cal.id}${age}`;
}

function warningsHtml(list) { return (list || []).map((w) => `<li>${esc(inBar(w))}</li>`).join(""); }

// ----------------------------------------------------------------------------- form checks
// What a specimen can weigh and occupy (common practice for pycnometer cells of about 1-500 cm³); the
// daemon refuses the same, naming the field, so a script gets the same answer as the form.
const MASS_G = { mg: 1e-3, g: 1, kg: 1e3 };
const VOLUME_CM3 = { mm3: 1e-3, "mm³": 1e-3, cm3: 1, "cm³": 1, "cm^3": 1, ml: 1, mL: 1, cc: 1 };
function quantity(text, units, fallback) {
  const m = String(text).trim().match(/^([0-9]*\.?[0-9]+(?:[eE][+-]?[0-9]+)?)\s*([A-Za-z³^0-9]*)$/);
  if (!m) return null;
  const unit = m[2] || fallback;
  if (!(unit in units)) return { bad: unit };
  return { value: Number(m[1]) * units[unit] };
}
function checkForm() {
  const errs = {};
  if (!$("f-sample").value.trim()) errs.sample_id = "give the specimen's ID";
  const mass = $("f-mass").value.trim();
  if (mass) {
    const q = quantity(mass, MASS_G, "g");
    if (!q) errs.mass = "a number and a mass unit, e.g. 19.62 g";
    else if (q.bad !== undefined) errs.mass = `"${q.bad}" is not a mass unit (mg, g or kg)`;
    else if (!(q.value >= 1e-3 && q.value <= 1e4)) errs.mass = "between 1 mg and 10 kg: is the unit right?";
  }
  const bulk = $("f-bulk").value.trim();
  if (bulk) {
    const q = quantity(bulk, VOLUME_CM3, "cm3");
    if (!q) errs.bulk_volume = "a number and a volume unit, e.g. 6 cm3";
    else if (q.bad !== undefined) errs.bulk_volume = `"${q.bad}" is not a volume unit (mm3, cm3, mL)`;
    else if (!(q.value >= 0.01 && q.value <= 1000)) errs.bulk_volume = "between 0.01 and 1000 cm³: is the unit right?";
  }
  return errs;
}
function showFieldErrors(errs) {
  for (const [field, input] of [["sample_id", "f-sample"], ["mass", "f-mass"], ["bulk_volume", "f-bulk"], ["operator", "f-operator"]]) {
    $(`e-${field}`).textContent = errs[field] || "";
    $(input).classList.toggle("invalid", !!errs[field]);
  }
}

// ----------------------------------------------------------------------------- schematic
function el(tag, attrs, parent, text) {
  const e = document.createElementNS(SVGNS, tag);
  for (const [k, v] of Object.entries(attrs || {})) e.setAttribute(k, v);
  if (text !== undefined) e.textContent = text;
  if (parent) parent.appendChild(e);
  return e;
}

function valve(svg, name, role, x, y, vertical) {
  const g = el("g", { class: "valve closed", "data-valve": name, transform: `translate(${x},${y})` }, svg);
  const d = vertical ? "M-11,-14 L11,-14 L-11,14 L11,14 Z" : "M-14,-11 L-14,11 L14,-11 L14,11 Z";
  el("path", { d }, g);
  const tx = vertical ? 20 : 0, ty = vertical ? 0 : -18;
  el("text", { x: tx, y: ty - 2, "text-anchor": vertical ? "start" : "middle", class: "label" }, g, name);
  el("text", { x: tx, y: ty + (vertical ? 13 : 36), "text-anchor": vertical ? "start" : "middle", class: "state" }, g, "closed");
  el("title", {}, g, `${role} valve ${name}`);
  return g;
}

function drawSchematic(desc) {
  const svg = $("schematic");
  svg.innerHTML = "";
  const roles = desc.roles, ch = desc.chambers;
  const exp = Object.entries(roles.expansion);
  const n = Math.max(exp.length, 1);
  const rowH = 78;
  const cy = Math.max(140, 50 + ((n - 1) * rowH) / 2);   // centre line of supply, inlet and cell
  const top = cy - ((n - 1) * rowH) / 2 - 10;          // first expansion row sits at top + 10
  const h = Math.max(cy + 130, top + n * rowH + 30);
  svg.setAttribute("viewBox", `0 0 720 ${h}`);
  // pipes first (under the symbols)
  el("path", { d: `M78,${cy} H250`, class: "pipe", id: "pipe-supply" }, svg);
  el("path", { d: `M250,${cy} H290`, class: "pipe", id: "pipe-cell-in" }, svg);
  el("path", { d: `M340,${cy + 46} V${cy + 96} H210`, class: "pipe", id: "pipe-vent" }, svg);
  // supply cylinder
  el("rect", { x: 24, y: cy - 50, width: 54, height: 100, rx: 18, class: "vessel gas" }, svg);
  el("text", { x: 51, y: cy + 70, "text-anchor": "middle", class: "label" }, svg, "supply");
  el("text", { x: 51, y: cy + 84, "text-anchor": "middle", class: "sub" }, svg, desc.gas);
  valve(svg, roles.inlet, "inlet", 165, cy, false);
  // sample cell with its transducer
  el("rect", { x: 290, y: cy - 46, width: 100, height: 92, rx: 8, class: "vessel", id: "cell" }, svg);
  el("text", { x: 340, y: cy - 2, "text-anchor": "middle", class: "label" }, svg, "sample cell");
  el("text", { x: 340, y: cy + 14, "text-anchor": "middle", class: "sub" }, svg, `${ch.cell_cm3.toFixed(2)} cm³`);
  el("path", { d: `M340,${cy - 46} V${cy - 66}`, class: "pipe" }, svg);
  const gg = el("g", { class: "gauge", transform: `translate(340,${cy - 92})` }, svg);
  el("circle", { r: 26 }, gg);
  el("text", { x: 0, y: 5, "text-anchor": "middle", class: "val", id: "gauge-val" }, gg, "--");
  el("text", { x: -34, y: -4, "text-anchor": "end", class: "label" }, gg, "transducer");
  el("text", { x: -34, y: 11, "text-anchor": "end", class: "sub" }, gg, "bar gauge");
  // vent
  valve(svg, roles.vent, "vent", 250, cy + 96, false);
  el("path", { d: `M236,${cy + 96} H160`, class: "pipe" }, svg);
  el("path", { d: `M160,${cy + 88} L146,${cy + 96} L160,${cy + 104} Z`, fill: "#8995a3" }, svg);
  el("text", { x: 120, y: cy + 100, "text-anchor": "end", class: "label" }, svg, "vent");
  el("text", { x: 120, y: cy + 114, "text-anchor": "end", class: "sub" }, svg, "to atmosphere");
  // manifold to the expansion volumes
  const y0 = top + 10, y1 = top + 10 + (n - 1) * rowH;
  el("path", { d: `M390,${cy} H440`, class: "pipe", id: "pipe-manifold" }, svg);
  if (n > 1) el("path", { d: `M440,${y0} V${y1}`, class: "pipe" }, svg);
  exp.forEach(([vol, vname], i) => {
    const y = top + 10 + i * rowH;
    el("path", { d: `M440,${y} H560`, class: "pipe", "data-exp-pipe": vol }, svg);
    valve(svg, vname, `expansion (${vol})`, 500, y, false);
    el("rect", { x: 560, y: y - 28, width: 130, height: 56, rx: 10, class: "vessel", "data-exp": vol }, svg);
    el("text", { x: 625, y: y - 3, "text-anchor": "middle", class: "label" }, svg, `${vol} volume`);
    el("text", { x: 625, y: y + 13, "text-anchor": "middle", class: "sub" }, svg, `${(ch.expansion_cm3[vol] ?? 0).toFixed(2)} cm³`);
  });
}

function updateSchematic(valves, gauge) {
  const svg = $("schematic");
  const desc = view.desc;
  if (!desc) return;
  for (const g of svg.querySelectorAll("g.valve")) {
    const open = !!(valves || {})[g.getAttribute("data-valve")];
    g.setAttribute("class", "valve " + (open ? "open" : "closed"));
    g.querySelector("text.state").textContent = open ? "OPEN" : "closed";
  }
  const pressurised = gauge !== null && gauge !== undefined && gauge > 2000;
  $("cell").setAttribute("class", "vessel" + (pressurised ? " gas" : ""));
  $("gauge-val").textContent = gauge === null || gauge === undefined ? "invalid" : fmtBar(gauge, 3);
  const inletOpen = !!(valves || {})[desc.roles.inlet];
  $("pipe-cell-in").setAttribute("class", "pipe" + (inletOpen || pressurised ? " gas" : ""));
  $("pipe-manifold").setAttribute("class", "pipe" + (pressurised ? " gas" : ""));
  for (const [vol, vname] of Object.entries(desc.roles.expansion)) {
    const on = pressurised && !!(valves || {})[vname];
    const box = svg.querySelector(`rect[data-exp="${CSS.escape(vol)}"]`);
    if (box) box.setAttribute("class", "vessel" + (on ? " gas" : ""));
  }
}

// ----------------------------------------------------------------------------- trace
// the run-state vocabulary (name, label, colour, terminal) as the daemon serves it: GET /api/states
let STATES = [];
let STATE_COLOUR = {};
const BAND_ALPHA = 0.55;  // the state colours drawn pale under the trace

async function loadStates() {
  STATES = await api("GET", "/api/states");
  STATE_COLOUR = Object.fromEntries(STATES.map((s) => [s.name, s.colour]));
}

function addPoint(t, p, state) {
  if (t === null || t === undefined) return;
  const n = view.t.length;
  if (n && t < view.t[n - 1]) { view.t = []; view.p = []; view.states = []; }  // daemon restarted
  view.t.push(t); view.p.push(p); view.states.push(state || "idle");
  if (view.t.length > MAX_POINTS) { view.t.splice(0, 500); view.p.splice(0, 500); view.states.splice(0, 500); }
}

function drawTrace() {
  const c = $("trace");
  const dpr = window.devicePixelRatio || 1;
  const w = c.clientWidth, h = c.clientHeight || 300;
  if (c.width !== Math.round(w * dpr)) { c.width = Math.round(w * dpr); c.height = Math.round(h * dpr); }
  const ctx = c.getContext("2d");
  ctx.setTransform(dpr, 0, 0, dpr, 0, 0);
  ctx.clearRect(0, 0, w, h);
  const L = 52, R = 12, T = 10, B = 28;
  const n = view.t.length;
  const tEnd = n ? view.t[n - 1] : WINDOW_S, t0 = tEnd - WINDOW_S;
  let i0 = 0;
  while (i0 < n && view.t[i0] < t0) i0++;
  let pmax = 1.5e5;
  for (let i = i0; i < n; i++) if (view.p[i] !== null && view.p[i] > pmax) pmax = view.p[i];
  const limit = view.desc ? view.desc.max_pressure_pa : null;
  const ytop = Math.ceil((pmax * 1.1) / 0.25e5) * 0.25e5;
  const X = (t) => L + ((t - t0) / WINDOW_S) * (w - L - R);
  const Y = (p) => T + (1 - p / ytop) * (h - T - B);
  // state bands
  ctx.globalAlpha = BAND_ALPHA;
  for (let i = i0; i < n; i++) {
    const col = STATE_COLOUR[view.states[i]];
    if (!col) continue;
    const xa = X(view.t[i]), xb = i + 1 < n ? X(view.t[i + 1]) : xa + 2;
    ctx.fillStyle = col; ctx.fillRect(xa, T, Math.max(xb - xa, 1), h - T - B);
  }
  ctx.globalAlpha = 1;
  // grid and axes
  ctx.strokeStyle = "#e3e8ee"; ctx.fillStyle = "#6b7785"; ctx.lineWidth = 1; ctx.font = "11px system-ui, sans-serif";
  const step = ytop > 2e5 ? 0.5e5 : 0.25e5;
  ctx.textAlign = "right"; ctx.textBaseline = "middle";
  for (let p = 0; p <= ytop + 1; p += step) {
    ctx.beginPath(); ctx.moveTo(L, Y(p)); ctx.lineTo(w - R, Y(p)); ctx.stroke();
    ctx.fillText((p / 1e5).toFixed(2), L - 6, Y(p));
  }
  ctx.textAlign = "center"; ctx.textBaseline = "top";
  for (let s = 0; s <= WINDOW_S; s += 60) {
    const x = X(t0 + s);
    ctx.beginPath(); ctx.moveTo(x, T); ctx.lineTo(x, h - B); ctx.stroke();
    ctx.fillText(s === WINDOW_S ? "now" : `-${(WINDOW_S - s) / 60} min`, x, h - B + 6);
  }
  ctx.save(); ctx.translate(12, T + (h - T - B) / 2); ctx.rotate(-Math.PI / 2);
  ctx.textAlign = "center"; ctx.fillText("bar gauge", 0, 0); ctx.restore();
  if (limit && limit <= ytop) {
    ctx.strokeStyle = "#c8372d"; ctx.setLineDash([6, 4]);
    ctx.beginPath(); ctx.moveTo(L, Y(limit)); ctx.lineTo(w - R, Y(limit)); ctx.stroke(); ctx.setLineDash([]);
    ctx.fillStyle = "#c8372d"; ctx.textAlign = "left"; ctx.textBaseline = "bottom";
    ctx.fillText("trip limit", L + 4, Y(limit) - 2);
  }
  // the trace
  ctx.strokeStyle = "#1f6fb2"; ctx.lineWidth = 2; ctx.beginPath();
  let pen = false;
  for (let i = i0; i < n; i++) {
    const p = view.p[i];
    if (p === null) { pen = false; continue; }
    const x = X(view.t[i]), y = Y(Math.max(p, 0));
    if (pen) ctx.lineTo(x, y); else ctx.moveTo(x, y);
    pen = true;
  }
  ctx.stroke();
}

function drawLegend() {
  $("legend").innerHTML = STATES.filter((s) => !s.terminal && s.colour.toLowerCase() !== "#ffffff")
    .map((s) => `<span><i style="background:${esc(s.colour)};opacity:${BAND_ALPHA}"></i>${esc(s.label)}</span>`).join("") +
    '<span><i style="background:#fff;border-color:#c8372d;border-style:dashed"></i>trip limit</span>';
}

// ----------------------------------------------------------------------------- status panels
function renderStatus(s) {
  view.status = s;
  if (!view.desc || JSON.stringify(view.desc) !== JSON.stringify(s.instrument)) { view.desc = s.instrument; drawSchematic(s.instrument); }
  $("inst-name").textContent = s.instrument.name;
  $("sim-badge").classList.toggle("hidden", !s.instrument.simulated);
  let act = s.activity;
  if (act === "idle" && s.queue.paused) act = "paused";
  if (s.interlock.latched) act = "tripped";
  const pill = $("activity");
  pill.textContent = { tripped: "interlock", paused: "queue paused" }[act] || act;
  pill.className = "pill " + act;
  renderPressure(s.pressure.gauge_pa, s.state, s.valves);
  $("temp").textContent = s.pressure.temperature_k ? `${(s.pressure.temperature_k - 273.15).toFixed(2)} °C` : "--";
  const b = $("banner");
  if (s.interlock.latched) {
    b.className = "banner trip";
    b.textContent = `Interlock latched — ${s.interlock.kind}: ${inBar(s.interlock.message)}. The system is in the safe state; reset once the cause is cleared.`;
  } else if (s.queue.paused && s.queue.paused_reason) {
    b.className = "banner paused"; b.textContent = `Queue paused — ${s.queue.paused_reason}`;
  } else { b.className = "banner hidden"; }
  const cur = s.current_run;
  $("run-none").classList.toggle("hidden", !!cur);
  $("run-info").classList.toggle("hidden", !cur);
  $("btn-abort").disabled = !cur;
  $("btn-reset").disabled = !s.interlock.latched;
  $("btn-resume").classList.toggle("hidden", !s.queue.paused);
  if (cur) renderRun(cur);
  renderLast(cur ? null : s.last_run);
  $("queue-state").textContent = s.queue.paused ? "(paused)" : "";
}

function renderPressure(gauge, state, valves) {
  $("p-big").textContent = gauge === null || gauge === undefined ? "invalid" : fmtBar(gauge, 4);
  $("state").textContent = (state || "--").replace("_", " ");
  updateSchematic(valves, gauge);
}

function renderLast(last) {
  const box = $("last");
  box.classList.toggle("hidden", !last);
  if (!last) return;
  let html = `<div class="cap">last run · ${esc(last.sample_id || "no sample ID")} · ${esc(last.sequence)} · ` +
    `<span class="status ${esc(last.status)}">${esc(last.status)}</span></div>`;
  if (last.volume_cm3 != null) html += `<div class="big">${pm(last.volume_cm3, last.volume_u_cm3, 4)} cm³</div>`;
  if (last.density_g_cm3 != null) html += `<div class="big">${pm(last.density_g_cm3, last.density_u_g_cm3, 4)} g/cm³</div>`;
  if (last.volume_cm3 != null) html += `<div class="cap">expanded uncertainty, k = ${last.k ?? 2}</div>`;
  if (last.message) html += `<div class="cap">${esc(inBar(last.message))}</div>`;
  if (last.volume_cm3 != null) {
    const conv = { true: "converged", false: "NOT converged" }[String(last.converged)] || "convergence not judged";
    const cal = last.calibrated === false ? "UNCALIBRATED (nominal volumes)" : last.calibration_id
      ? `calibration ${esc(last.calibration_id)}` : "";
    html += `<div class="cap">${esc(conv)}${cal ? " · " + cal : ""}${last.simulated ? " · SIMULATED" : ""}</div>`;
  }
  if ((last.warnings || []).length) html += `<ul class="warnings">${warningsHtml(last.warnings)}</ul>`;
  box.innerHTML = html;
}

function renderRun(cur) {
  $("run-id").textContent = cur.run_id;
  $("run-sample").textContent = cur.sample_id || "–";
  $("run-seq").textContent = `${cur.sequence} (${cur.expansion_volume} volume)`;
  $("run-cycle").textContent = cur.cycles_total ? `${cur.cycle} of ${cur.cycles_total}` + (cur.purge_pulse && !cur.cycle ? ` · purge ${cur.purge_pulse}` : "") : (cur.purge_pulse ? `purge ${cur.purge_pulse}` : "–");
  $("run-cal").textContent = calText(cur.calibration);
  $("run-warnings").innerHTML = warningsHtml(cur.warnings);
  const done = (cur.cycles || []).length, total = cur.cycles_total || 1;
  $("run-bar").style.width = `${Math.min(100, (100 * done) / total)}%`;
  const body = $("run-cycles").querySelector("tbody");
  body.innerHTML = (cur.cycles || []).map((c) => `<tr class="${c.kept === false ? "discarded" : ""}"><td>${c.cycle}</td>` +
    `<td class="num">${fmtBar(c.p1_gauge_pa, 4)}</td><td class="num">${fmtBar(c.p2_gauge_pa, 4)}</td>` +
    `<td class="num">${c.volume_m3 == null ? "–" : pm(c.volume_m3 * 1e6, (c.u_volume_m3 ?? 0) * 1e6, 4)}</td><td>${c.kept === false ? "discarded" : ""}</td></tr>`).join("");
}

async function refreshStatus() { try { renderStatus(await api("GET", "/api/status")); } catch (e) { /* stream will retry */ } }

async function refreshQueue() {
  try {
    const q = await api("GET", "/api/queue");
    const ul = $("queue");
    ul.innerHTML = q.items.length ? "" : '<li class="muted">Nothing waiting.</li>';
    for (const it of q.items) {
      const li = document.createElement("li");
      li.innerHTML = `<span class="grow"><b>${esc(it.sample_id || "(no sample ID)")}</b> · ${esc(it.sequence)}` +
        `${it.mass_g ? " · " + it.mass_g.toFixed(4) + " g" : ""}<br><span class="muted">${esc(it.run_id)}</span></span>`;
      const btn = document.createElement("button");
      btn.textContent = "remove";
      btn.onclick = async () => { try { await api("DELETE", `/api/queue/${encodeURIComponent(it.run_id)}`); refreshQueue(); } catch (e) { say(e.message); } };
      li.appendChild(btn);
      ul.appendChild(li);
    }
  } catch (e) { /* ignore */ }
}

async function refreshRuns() {
  let runs;
  try { runs = (await api("GET", "/api/runs?limit=12")).runs; } catch (e) { return; }
  runs = runs.filter((r) => r.status !== "queued");
  for (const r of runs) {
    if (r.status !== "running" && !view.details[r.run_id]) {
      try {
        const one = await api("GET", `/api/runs/${r.run_id}`);
        view.details[r.run_id] = { ...(one.summary || {}), links: one.links || {} };
      } catch (e) { view.details[r.run_id] = { links: {} }; }
    }
  }
  const body = $("results").querySelector("tbody");
  body.innerHTML = runs.map((r) => {
    const d = view.details[r.run_id] || {};
    const vol = r.volume_cm3 == null ? "–" : pm(r.volume_cm3, r.volume_u_cm3, 4);
    const den = d.density_g_cm3 == null ? "–" : pm(d.density_g_cm3, d.density_u_g_cm3, 4);
    // "finished" is when it finished: empty while it runs
    const when = r.status === "running" ? "" : (r.ended || "").replace("T", " ").slice(0, 19);
    const names = { "trace.csv": "trace", "summary.json": "summary", report: "report" };
    const files = Object.entries(d.links || {}).map(([k, href]) => `<a href="${esc(href)}">${names[k] || esc(k)}</a>`).join(" · ");
    const why = r.message ? ` title="${esc(r.message)}"` : "";
    return `<tr data-run="${esc(r.run_id)}"><td>${esc(when)}</td><td>${esc(r.run_id)}</td><td>${esc(r.sample_id || "–")}</td><td>${esc(r.sequence)}</td>` +
      `<td><span class="status ${esc(r.status)}"${why}>${esc(r.status)}</span></td><td class="num">${vol}</td><td class="num">${den}</td><td>${files}</td></tr>`;
  }).join("") || '<tr><td colspan="8" class="muted">No runs yet.</td></tr>';
}

// ----------------------------------------------------------------------------- live stream
let statusTimer = null;
function soonStatus() { if (!statusTimer) statusTimer = setTimeout(() => { statusTimer = null; refreshStatus(); }, 150); }

function connect() {
  const es = new EventSource("/api/events");
  es.onopen = () => { $("conn").textContent = "live"; $("conn").className = "conn live"; };
  es.onerror = () => { $("conn").textContent = "reconnecting…"; $("conn").className = "conn"; };
  es.addEventListener("status", (ev) => renderStatus(JSON.parse(ev.data)));
  es.addEventListener("sample", (ev) => {
    const d = JSON.parse(ev.data);
    addPoint(d.t, d.gauge_pa, d.state);
    renderPressure(d.gauge_pa, d.state, d.valves);
  });
  for (const kind of ["state", "cycle", "cycle_done", "purge_pulse", "trip", "reset", "daemon", "run_started", "settled", "warning"]) {
    es.addEventListener(kind, soonStatus);
  }
  es.addEventListener("queue", () => { refreshQueue(); soonStatus(); });
  es.addEventListener("run_finished", () => { refreshRuns(); refreshQueue(); soonStatus(); });
  es.addEventListener("run_started", () => { refreshRuns(); refreshQueue(); });
}

// ----------------------------------------------------------------------------- controls
async function init() {
  await refreshStatus();
  try {
    const tr = await api("GET", "/api/trace?seconds=" + WINDOW_S);
    tr.t.forEach((t, i) => addPoint(t, tr.gauge_pa[i], (tr.state || [])[i] || "idle"));
  } catch (e) { /* empty trace */ }
  try {
    const seqs = (await api("GET", "/api/sequences")).sequences;
    $("f-seq").innerHTML = seqs.map((s) => `<option${s === "grain-volume" ? " selected" : ""}>${esc(s)}</option>`).join("");
  } catch (e) { /* ignore */ }
  refreshQueue(); refreshRuns(); connect();
  try { await loadStates(); } catch (e) { /* no bands until the vocabulary loads */ }
  drawLegend();
  setInterval(drawTrace, 250);
  setInterval(refreshStatus, 5000);
  $("submit-form").addEventListener("submit", async (ev) => {
    ev.preventDefault();
    const errs = checkForm();
    showFieldErrors(errs);
    if (Object.keys(errs).length) { say("Not queued: see the marked fields."); return; }
    const body = { sequence: $("f-seq").value, sample_id: $("f-sample").value.trim(), operator: $("f-operator").value };
    if ($("f-mass").value.trim()) body.mass = $("f-mass").value.trim();
    if ($("f-bulk").value.trim()) body.bulk_volume = $("f-bulk").value.trim();
    try {
      const out = await api("POST", "/api/runs", body);
      say(`Queued ${out.run_id}.`, true); $("f-sample").value = ""; $("f-mass").value = ""; $("f-bulk").value = "";
      showFieldErrors({});
      refreshQueue();
    } catch (e) {
      const field = e.data && e.data.field;
      if (field && $(`e-${field}`)) { showFieldErrors({ [field]: e.message }); say("Not queued: see the marked field."); }
      else say(e.message + (e.data && e.data.problems && e.data.problems.length ? ": " + e.data.problems.join("; ") : ""));
    }
  });
  $("btn-abort").onclick = async () => {
    if (!confirm("Abort the active run? The instrument goes to the safe state and the queue pauses.")) return;
    try { await api("POST", "/api/abort"); say("Aborting: venting to the safe state.", true); } catch (e) { say(e.message); }
  };
  $("btn-reset").onclick = async () => {
    try { const r = await api("POST", "/api/reset"); say(`Interlock reset: ${r.message}.`, true); refreshStatus(); } catch (e) { say(e.message); }
  };
  $("btn-resume").onclick = async () => { try { await api("POST", "/api/queue/resume"); say("Queue resumed.", true); refreshStatus(); } catch (e) { say(e.message); } };
}

init();
