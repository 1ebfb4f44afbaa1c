// packbench console: the bays page (live over server-sent events, start,
// stop, resume) and the packs page (sortable, filterable). No library, no
// network beyond this console.
"use strict";

const HEADERS = { "Content-Type": "application/json", "X-Packbench-Request": "1" };

async function post(url, body) {
  const r = await fetch(url, { method: "POST", headers: HEADERS, body: JSON.stringify(body || {}) });
  let data = {};
  try { data = await r.json(); } catch (_) { /* empty body */ }
  return { status: r.status, data };
}

function el(tag, attrs, ...children) {
  const e = document.createElement(tag);
  for (const [k, v] of Object.entries(attrs || {})) {
    if (k === "class") e.className = v;
    else if (k.startsWith("on")) e.addEventListener(k.slice(2), v);
    else e.setAttribute(k, v);
  }
  for (const c of children) {
    if (c === null || c === undefined) continue;
    e.append(c instanceof Node ? c : String(c));
  }
  return e;
}

const fmt = (x, d) => (x === null || x === undefined ? "–" : Number(x).toFixed(d));

function duration(s) {
  if (s === null || s === undefined) return "–";
  s = Math.max(0, Math.round(s));
  const h = Math.floor(s / 3600), m = Math.floor((s % 3600) / 60), r = s % 60;
  return h ? `${h} h ${m} min` : m ? `${m} min ${r} s` : `${r} s`;
}

// ---- bays ----------------------------------------------------------------

const traces = {}; // bay name -> [[t, V], ...] for the small chart
let procedures = [];
let startBay = null;

function chart(name, live) {
  const pts = traces[name] || (traces[name] = []);
  if (live && (!pts.length || pts[pts.length - 1][0] !== live.run_t_s)) {
    if (pts.length && live.run_t_s < pts[pts.length - 1][0]) pts.length = 0; // a new run
    pts.push([live.run_t_s, live.voltage_v]);
    if (pts.length > 600) pts.shift();
  }
  const svg = document.createElementNS("http://www.w3.org/2000/svg", "svg");
  svg.setAttribute("class", "chart");
  svg.setAttribute("viewBox", "0 0 300 60");
  svg.setAttribute("preserveAspectRatio", "none");
  svg.setAttribute("aria-label", `voltage of bay ${name}`);
  if (pts.length > 1) {
    const t0 = pts[0][0], t1 = pts[pts.length - 1][0];
    let v0 = Infinity, v1 = -Infinity;
    for (const p of pts) { v0 = Math.min(v0, p[1]); v1 = Math.max(v1, p[1]); }
    if (v1 - v0 < 0.05) { v0 -= 0.025; v1 += 0.025; }
    const line = document.createElementNS("http://www.w3.org/2000/svg", "polyline");
    line.setAttribute("points", pts.map(p =>
      `${((p[0] - t0) / Math.max(t1 - t0, 1e-9) * 300).toFixed(1)},${(58 - (p[1] - v0) / (v1 - v0) * 56).toFixed(1)}`).join(" "));
    svg.append(line);
  }
  return svg;
}

function bayTile(b) {
  const l = b.live, r = b.result;
  const tile = el("article", { class: "bay", id: `bay-${b.name}`, "data-state": b.state });
  tile.append(el("h2", {}, `Bay ${b.name}`, el("span", { class: `state ${b.state}`, "data-role": "state" }, b.state)));
  if (l) {
    tile.append(el("div", { class: "muted" },
      `${l.pack_id} · step ${l.step}/${l.steps} ${l.kind || ""}`));
    tile.append(el("div", { class: "figures" },
      el("div", {}, el("span", {}, "voltage"), el("b", { "data-role": "voltage" }, `${fmt(l.voltage_v, 3)} V`)),
      el("div", {}, el("span", {}, "current"), el("b", { "data-role": "current" }, `${fmt(l.current_a, 3)} A`)),
      el("div", {}, el("span", {}, "power"), `${fmt(l.power_w, 1)} W`),
      el("div", {}, el("span", {}, "step charge"), `${fmt(l.step_ah, 3)} Ah`),
      el("div", {}, el("span", {}, "step energy"), `${fmt(l.step_wh, 1)} Wh`),
      el("div", {}, el("span", {}, "charge (est.)"), l.soc_pct === null ? "?" : `~${fmt(l.soc_pct, 0)} %`),
      el("div", {}, el("span", {}, "step ends in"), l.eta_s === null ? "–" : `${l.eta_lower_bound ? ">" : "~"}${duration(l.eta_s)}`),
      el("div", {}, el("span", {}, "run time"), duration(l.run_t_s)),
      el("div", {}, el("span", {}, "temperature"), l.temperature_c === null ? "–" : `${fmt(l.temperature_c, 1)} °C`),
      ...(l.group_low ? [
        el("div", {}, el("span", {}, "lowest group"), el("b", { "data-role": "group-low" }, `#${l.group_low[0]} ${fmt(l.group_low[1], 3)} V`)),
        el("div", {}, el("span", {}, "highest group"), `#${l.group_high[0]} ${fmt(l.group_high[1], 3)} V`)] : [])));
    tile.append(chart(b.name, b.state === "running" ? l : null));
    for (const a of l.alarms) tile.append(el("div", { class: "alarm" }, `Alarm: ${a}`));
  }
  if (r) {
    const res = el("div", { class: "result", "data-role": "result" });
    if (r.error) res.append(el("span", { class: "error" }, r.error));
    else {
      res.append(`${r.status}`);
      const pm = (u, d) => (u === null || u === undefined) ? "" : ` ± ${fmt(u, d)}`;
      if (r.capacity_ah !== null) res.append(` · ${fmt(r.capacity_ah, 3)}${pm(r.capacity_u95_ah, 3)} Ah`);
      if (r.soh_pct !== null) res.append(` · SOH ${fmt(r.soh_pct, 1)}${pm(r.soh_u95_pct, 1)} %`);
      if (r.grade) res.append(` · grade ${r.grade}${r.grade_conditional ? " (conditional)" : ""}`);
      if (r.stop_reason) res.append(el("div", { class: "muted" }, r.stop_reason));
    }
    tile.append(res);
  }
  const actions = el("div", { class: "actions" });
  const busy = b.state === "running" || b.state === "starting";
  if (!busy) actions.append(el("button", { type: "button", "data-action": "start", onclick: () => openStart(b.name) }, "Start"));
  if (busy) actions.append(el("button", { type: "button", class: "danger", "data-action": "stop", onclick: () => stopBay(b.name) }, "Stop"));
  if (r && r.resumable) actions.append(el("button", { type: "button", "data-action": "resume", onclick: () => resumeBay(b.name) }, "Resume"));
  if (r && r.run_id) {
    actions.append(el("a", { class: "button", "data-action": "report", href: `/packs/${encodeURIComponent(r.pack_id)}/runs/${encodeURIComponent(r.run_id)}` }, "Report"));
    actions.append(el("a", { class: "button", "data-action": "label", href: `/packs/${encodeURIComponent(r.pack_id)}/runs/${encodeURIComponent(r.run_id)}/label` }, "Label"));
  }
  tile.append(actions);
  return tile;
}

function renderBays(list) {
  const root = document.getElementById("bays");
  root.replaceChildren(...list.map(bayTile));
}

async function stopBay(name) {
  if (!confirm(`Stop the test on bay ${name}? Outputs go off; the run can be resumed.`)) return;
  const r = await post(`/api/bays/${encodeURIComponent(name)}/stop`);
  if (r.status >= 400) alert(r.data.error || `stop refused (${r.status})`);
}

async function resumeBay(name) {
  const r = await post(`/api/bays/${encodeURIComponent(name)}/resume`);
  if (r.status >= 400) alert(r.data.error || `resume refused (${r.status})`);
}

function formBody() {
  const f = document.getElementById("start-form");
  const o = {};
  for (const k of ["pack_id", "chemistry", "series", "rated", "procedure"]) o[k] = f.elements[k].value;
  return o;
}

function showErrors(errors) {
  for (const e of document.querySelectorAll(".field-error")) e.textContent = "";
  for (const [field, message] of Object.entries(errors || {})) {
    const p = document.getElementById(`e-${field}`) || document.getElementById("e-");
    p.textContent = message;
  }
}

function openStart(name) {
  startBay = name;
  document.getElementById("start-bay").textContent = name;
  const sel = document.getElementById("f-procedure");
  sel.replaceChildren(...procedures.map(p => el("option", { value: p }, p)));
  showErrors({});
  document.getElementById("forecast").hidden = true;
  document.getElementById("confirm-button").disabled = true;
  document.getElementById("start-dialog").showModal();
  document.getElementById("f-pack_id").focus();
}

async function checkForm() {
  const r = await post(`/api/bays/${encodeURIComponent(startBay)}/check`, formBody());
  const fc = document.getElementById("forecast");
  if (r.status === 200) {
    showErrors({});
    fc.textContent = (r.data.pack_note ? `note: ${r.data.pack_note}\n` : "") + r.data.forecast_text;
    fc.hidden = false;
    document.getElementById("confirm-button").disabled = false;
  } else {
    showErrors(r.data.errors || { "": r.data.error || `refused (${r.status})` });
    fc.hidden = true;
    document.getElementById("confirm-button").disabled = true;
  }
}

async function confirmStart() {
  const r = await post(`/api/bays/${encodeURIComponent(startBay)}/start`, formBody());
  if (r.status === 202) document.getElementById("start-dialog").close();
  else {
    showErrors(r.data.errors || { "": r.data.error || `refused (${r.status})` });
    document.getElementById("confirm-button").disabled = true;
  }
}

function bayPage() {
  fetch("/api/procedures").then(r => r.json()).then(p => { procedures = p; });
  const f = document.getElementById("start-form");
  for (const k of ["pack_id", "chemistry", "series", "rated", "procedure"]) {
    f.elements[k].addEventListener("input", () => { document.getElementById("confirm-button").disabled = true; });
  }
  // A barcode scanner types the id and Enter: check at once.
  document.getElementById("f-pack_id").addEventListener("keydown", e => {
    if (e.key === "Enter") { e.preventDefault(); checkForm(); }
  });
  document.getElementById("check-button").addEventListener("click", checkForm);
  document.getElementById("confirm-button").addEventListener("click", confirmStart);
  document.getElementById("cancel-button").addEventListener("click", () => document.getElementById("start-dialog").close());
  const state = document.getElementById("link-state");
  const src = new EventSource("/api/stream");
  src.addEventListener("bays", e => {
    state.textContent = `live · ${new Date().toLocaleTimeString()}`;
    // Not while the form is open over them: the tiles redraw under it.
    renderBays(JSON.parse(e.data));
  });
  src.onerror = () => { state.textContent = "reconnecting…"; };
}

// ---- packs ---------------------------------------------------------------

function packsPage() {
  let rows = [], key = "rank", dir = 1;
  const body = document.querySelector("#packs tbody");
  const filter = document.getElementById("filter");
  const flags = r => [r.overdue ? "OVERDUE" : "", r.replace ? "REPLACE" : "", r.accelerating ? "ACCELERATING" : "",
    r.below_eol_since ? `BELOW-EOL-SINCE-${r.below_eol_since}` : "", r.eol_date_past ? "EOL-DATE-PAST" : "",
    (r.flags || []).length ? "FLAGGED" : ""].filter(Boolean).join(" ");
  const draw = () => {
    const q = filter.value.trim().toLowerCase();
    const shown = rows.filter(r => !q || [r.pack_id, r.chemistry, r.grade || "", flags(r)].join(" ").toLowerCase().includes(q));
    shown.sort((a, b) => {
      const x = key === "flags" ? flags(a) : a[key], y = key === "flags" ? flags(b) : b[key];
      if (x === y) return 0;
      if (x === null || x === undefined) return 1;
      if (y === null || y === undefined) return -1;
      return (x < y ? -1 : 1) * dir;
    });
    body.replaceChildren(...shown.map(r => el("tr", {},
      el("td", {}, r.rank),
      el("td", {}, el("a", { href: `/packs/${encodeURIComponent(r.pack_id)}` }, r.pack_id)),
      el("td", {}, `${r.chemistry} ${r.series}S`),
      el("td", {}, r.tests), el("td", {}, r.last_test || "–"),
      el("td", {}, fmt(r.soh_pct, 1)), el("td", {}, fmt(r.capacity_ah, 2)),
      el("td", {}, fmt(r.resistance_mohm, 1)), el("td", {}, r.grade || "–"),
      el("td", {}, r.eol_date || "–"), el("td", { title: (r.attention || []).join("\n") }, flags(r)))));
    document.getElementById("count").textContent = `${shown.length} of ${rows.length} packs`;
  };
  for (const th of document.querySelectorAll("#packs th")) {
    th.addEventListener("click", () => { const k = th.dataset.key; dir = k === key ? -dir : 1; key = k; draw(); });
  }
  filter.addEventListener("input", draw);
  fetch("/api/packs").then(r => r.json()).then(f => { rows = f.rows || []; draw(); });
}

document.addEventListener("DOMContentLoaded", () => {
  if (document.body.dataset.page === "bays") bayPage();
  if (document.body.dataset.page === "packs") packsPage();
});
