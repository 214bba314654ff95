// shiftwatch status page: the overview and a stream's page.  Plain JavaScript, no library;
// everything it asks for comes from the endpoint that served it.  Read-only: it only reads
// /status.json and /status/stream.json, every REFRESH_MS.
"use strict";

const REFRESH_MS = 5000;
const SVG = "http://www.w3.org/2000/svg";

function el(tag, attrs, text) {
  const e = document.createElement(tag);
  for (const [k, v] of Object.entries(attrs || {})) {
    if (v !== null && v !== undefined) e.setAttribute(k, v);
  }
  if (text !== undefined && text !== null) e.textContent = String(text);
  return e;
}

function svg(tag, attrs, text) {
  const e = document.createElementNS(SVG, tag);
  for (const [k, v] of Object.entries(attrs || {})) e.setAttribute(k, String(v));
  if (text !== undefined) e.textContent = String(text);
  return e;
}

function tag(text, cls) {
  return el("span", { class: "tag " + (cls || text) }, text);
}

function show(id, text) {
  const e = document.getElementById(id);
  if (e) e.textContent = text;
}

function problem(text) {
  const p = document.getElementById("problem");
  if (!p) return;
  p.hidden = !text;
  p.textContent = text || "";
}

async function getJson(url) {
  const r = await fetch(url, { cache: "no-store", credentials: "same-origin" });
  if (!r.ok) {
    let msg = r.status + " " + r.statusText;
    try { msg = (await r.json()).error || msg; } catch (e) { /* not JSON */ }
    throw new Error(msg);
  }
  return r.json();
}

function dash(x) {
  return x === null || x === undefined ? "–" : x;
}

// Fields other parts of shiftwatch add (acknowledgement, hold or planned window, stale) are
// shown when present and skipped when absent.
function extras(s) {
  const out = [];
  if (s.stale) out.push(tag("stale", "stale"));
  if (s.repeating) out.push(tag(s.repeating.text, "repeating"));
  if (s.hold) out.push(tag(s.hold.kind || "hold", "hold"));
  if (s.ack && s.ack.acked) out.push(tag("seen" + (s.ack.by ? " by " + s.ack.by : ""), "acked"));
  return out;
}

// ------------------------------------------------------------------ overview
function overviewRow(s) {
  const tr = el("tr", { class: "stream", "data-stream": s.stream });
  if (s.event_open) tr.classList.add("open");
  else if (s.recent) tr.classList.add("recent");
  if (s.stale) tr.classList.add("stale");
  if (s.repeating) tr.classList.add("repeating");
  const name = el("td", { class: "name" });
  const a = el("a", { href: "/status/stream?name=" + encodeURIComponent(s.stream) }, s.label || s.stream);
  name.appendChild(a);
  if (s.label) name.appendChild(el("small", {}, s.stream));
  tr.appendChild(name);
  const state = el("td", { class: "state" });
  state.appendChild(tag(s.state.replace("_", " "), s.state));
  for (const x of extras(s)) { state.appendChild(document.createTextNode(" ")); state.appendChild(x); }
  tr.appendChild(state);
  tr.appendChild(el("td", { class: "num level" }, dash(s.level_text)));
  tr.appendChild(el("td", { class: "num sigma" }, dash(s.sigma_text)));
  tr.appendChild(el("td", { class: "num rate" }, dash(s.samples_per_minute)));
  const ev = s.last_event;
  const phase = el("td", { class: "phase" });
  if (ev) phase.appendChild(tag(ev.phase)); else phase.textContent = "none yet";
  tr.appendChild(phase);
  tr.appendChild(el("td", { class: "when" }, ev ? ev.when_text : ""));
  tr.appendChild(el("td", { class: "num size", "data-delta": ev ? ev.delta : null },
    ev && ev.phase !== "dismissed" ? signed(ev.delta) + (s.unit ? " " + s.unit : "") : ""));
  tr.appendChild(el("td", { class: "num sigmas", "data-sigma": ev ? ev.delta_sigma : null },
    ev && ev.phase !== "dismissed" ? (fault(ev) || signed(ev.delta_sigma)) : ""));
  return tr;
}

// A record that names a sensor fault shows it in place of the size in sigmas (as
// display.fault_text): a stuck sensor's readings, or a spread that grew.
function fault(ev) {
  if (ev.repeated_value !== null && ev.repeated_value !== undefined) return "one value repeated";
  if (ev.spread_ratio !== null && ev.spread_ratio !== undefined) return "spread x" + Number(ev.spread_ratio).toPrecision(2);
  return null;
}

function signed(x) {
  if (x === null || x === undefined) return "";
  const t = Number(x).toPrecision(3).replace(/\.?0+$/, "").replace(/\.?0+e/, "e");
  return x > 0 ? "+" + t : t;
}

let filterTimer = null;

async function refreshOverview() {
  const q = document.getElementById("filter").value;
  try {
    const d = await getJson("/status.json?limit=500&q=" + encodeURIComponent(q));
    if (document.getElementById("filter").value !== q) return; // typed on meanwhile
    show("generated", d.generated_text);
    show("zone", d.time_zone);
    show("advisory", d.advisory);
    const c = d.counts;
    let text = c.streams + " stream(s); " + c.event_open + " with an open event, " + c.recent +
      " with an event in the last hour";
    if (q) text += "; " + c.matching + " match";
    if (c.shown < c.matching) text += "; the first " + c.shown + " shown (narrow by name to see others)";
    show("counts", text);
    const notices = document.getElementById("notices");
    if (notices) {
      notices.textContent = (d.notices || []).join(" ");
      notices.hidden = !(d.notices && d.notices.length);
    }
    const body = document.querySelector("#streams tbody");
    const rows = d.streams.map(overviewRow);
    if (rows.length === 0) {
      const tr = el("tr");
      tr.appendChild(el("td", { colspan: 9 }, q ? "no stream matches" : "no stream has sent samples yet"));
      rows.push(tr);
    }
    body.replaceChildren(...rows);
    problem("");
  } catch (e) {
    problem("The daemon did not answer (" + e.message + "); the figures below are from the last answer.");
  }
}

function startOverview() {
  const f = document.getElementById("filter");
  const params = new URLSearchParams(location.search);
  if (params.get("q")) f.value = params.get("q");
  f.addEventListener("input", () => {
    clearTimeout(filterTimer);
    filterTimer = setTimeout(refreshOverview, 150);
  });
  refreshOverview();
  setInterval(refreshOverview, REFRESH_MS);
}

// ---------------------------------------------------------------- stream page
let zoneName = "UTC";

function clockOf(t, withDate) {
  const opts = { timeZone: zoneName, hour: "2-digit", minute: "2-digit", second: "2-digit", hourCycle: "h23" };
  if (withDate) { opts.year = "numeric"; opts.month = "2-digit"; opts.day = "2-digit"; }
  try {
    return new Intl.DateTimeFormat("en-CA", opts).format(new Date(t * 1000)).replace(",", "");
  } catch (e) {
    return new Date(t * 1000).toISOString().slice(11, 19) + "Z";
  }
}

function niceStep(span, n) {
  const raw = span / Math.max(n, 1);
  const p = Math.pow(10, Math.floor(Math.log10(raw)));
  for (const m of [1, 2, 2.5, 5, 10]) if (m * p >= raw) return m * p;
  return 10 * p;
}

function drawChart(d) {
  const box = document.getElementById("chart");
  const W = 1000, H = 360, L = 70, R = 14, T = 12, B = 34;
  const t = d.samples.t, x = d.samples.x;
  const et = (d.earlier || { t: [] }).t, ex = (d.earlier || { x: [] }).x;
  const parts = [];
  if (t.length + et.length < 2) {
    parts.push(svg("text", { x: W / 2, y: H / 2, "text-anchor": "middle", class: "empty" },
      "no samples held yet"));
    box.replaceChildren(...parts);
    box.dataset.samples = String(t.length);
    return;
  }
  const t0 = et.length ? et[0] : t[0], t1 = t.length ? t[t.length - 1] : et[et.length - 1];
  const inView = d.events.filter(e => e.in_view);
  let lo = Math.min(...x, ...ex), hi = Math.max(...x, ...ex);
  for (const e of inView) {
    for (const v of [e.level_before, e.level_after]) if (v !== null) { lo = Math.min(lo, v); hi = Math.max(hi, v); }
  }
  if (d.level !== null) { lo = Math.min(lo, d.level); hi = Math.max(hi, d.level); }
  if (hi === lo) { hi += 1; lo -= 1; }
  const pad = (hi - lo) * 0.06; lo -= pad; hi += pad;
  const px = v => L + (v - t0) / (t1 - t0) * (W - L - R);
  const py = v => T + (hi - v) / (hi - lo) * (H - T - B);
  // axes and ticks
  parts.push(svg("line", { x1: L, y1: H - B, x2: W - R, y2: H - B, class: "axis" }));
  parts.push(svg("line", { x1: L, y1: T, x2: L, y2: H - B, class: "axis" }));
  const ys = niceStep(hi - lo, 6);
  for (let v = Math.ceil(lo / ys) * ys; v <= hi; v += ys) {
    parts.push(svg("line", { x1: L, y1: py(v), x2: W - R, y2: py(v), class: "axis" }));
    parts.push(svg("text", { x: L - 6, y: py(v) + 4, "text-anchor": "end", class: "tick" },
      Number(v.toPrecision(6))));
  }
  const unit = d.status.unit;
  if (unit) parts.push(svg("text", { x: 6, y: T + 10, class: "tick" }, unit));
  const span = t1 - t0;
  const xs = [1, 2, 5, 10, 15, 30, 60, 120, 300, 600, 900, 1800, 3600, 7200, 10800, 21600, 43200, 86400]
    .find(s => span / s <= 8) || 86400;
  for (let v = Math.ceil(t0 / xs) * xs; v <= t1; v += xs) {
    parts.push(svg("line", { x1: px(v), y1: H - B, x2: px(v), y2: H - B + 4, class: "axis" }));
    parts.push(svg("text", { x: px(v), y: H - B + 17, "text-anchor": "middle", class: "tick" }, clockOf(v, false)));
  }
  // shift-time intervals behind the samples
  for (const e of inView) {
    const a = Math.max(e.shift_at_low, t0), b = Math.min(e.shift_at_high, t1);
    parts.push(svg("rect", { x: px(a), y: T, width: Math.max(px(b) - px(a), 2), height: H - T - B,
      class: "band", "data-event": e.id }));
  }
  // samples kept with an event, which the engine has let go since: lighter
  for (let i = 0; i < et.length; i++) {
    parts.push(svg("circle", { cx: px(et[i]).toFixed(1), cy: py(ex[i]).toFixed(1), r: 1.6, class: "earlier" }));
  }
  // samples held now: a faint trace and a dot each
  let path = "";
  for (let i = 0; i < t.length; i++) path += (i ? "L" : "M") + px(t[i]).toFixed(1) + " " + py(x[i]).toFixed(1);
  parts.push(svg("path", { d: path, class: "trace" }));
  for (let i = 0; i < t.length; i++) {
    parts.push(svg("circle", { cx: px(t[i]).toFixed(1), cy: py(x[i]).toFixed(1), r: 1.8, class: "sample" }));
  }
  // fitted levels before and after each event in view
  const sorted = inView.slice().sort((a, b) => a.shift_at - b.shift_at);
  sorted.forEach((e, i) => {
    const prev = i > 0 ? Math.max(sorted[i - 1].shift_at, t0) : t0;
    const next = i + 1 < sorted.length ? sorted[i + 1].shift_at : t1;
    const s = Math.min(Math.max(e.shift_at, t0), t1);
    if (e.level_before !== null) {
      parts.push(svg("line", { x1: px(prev), y1: py(e.level_before), x2: px(s), y2: py(e.level_before),
        class: "before", "data-event": e.id }));
    }
    if (e.level_after !== null && e.phase !== "dismissed") {
      parts.push(svg("line", { x1: px(s), y1: py(e.level_after), x2: px(Math.min(next, t1)), y2: py(e.level_after),
        class: "after", "data-event": e.id }));
    }
    parts.push(svg("line", { x1: px(s), y1: T, x2: px(s), y2: H - B, class: "shift", "data-event": e.id }));
  });
  if (d.level !== null) {
    parts.push(svg("line", { x1: L, y1: py(d.level), x2: W - R, y2: py(d.level), class: "now" }));
  }
  box.replaceChildren(...parts);
  box.dataset.samples = String(t.length);
  box.dataset.earlier = String(et.length);
  show("span", "(" + t.length + " held now" + (et.length ? ", " + et.length + " earlier ones kept with the event" : "") +
    ", " + d.samples.from_text + " to " + d.samples.to_text + ")");
}

function fact(name, value) {
  const div = el("div");
  div.appendChild(el("b", {}, name));
  if (value instanceof Node) div.appendChild(value); else div.appendChild(document.createTextNode(dash(value)));
  return div;
}

function drawFacts(d) {
  const s = d.status;
  const state = el("span");
  state.appendChild(tag(s.state.replace("_", " "), s.state));
  for (const x of extras(s)) { state.appendChild(document.createTextNode(" ")); state.appendChild(x); }
  const parts = [fact("state", state), fact("level", s.level_text), fact("noise sigma", s.sigma_text),
    fact("samples / min", s.samples_per_minute), fact("samples in all", s.samples_total)];
  const ev = s.last_event;
  if (ev) parts.push(fact("last event", ev.phase + ", " + ev.when_text + ", " + ev.size_text));
  if (s.ack) parts.push(fact("acknowledged", (s.ack.acked ? "yes" : "no") + (s.ack.by ? ", by " + s.ack.by : "") +
    (s.ack.note ? ": " + s.ack.note : "")));
  if (s.hold) parts.push(fact(s.hold.kind || "hold", (s.hold.note || "") + (s.hold.until_text ? " until " + s.hold.until_text : "")));
  if (s.stale) parts.push(fact("source", "stale: its source announced it stopped"));
  if (s.repeating) parts.push(fact("readings", s.repeating.text + " (" + s.repeating.readings +
    " readings): a stuck sensor is possible; check it by your site's procedures"));
  for (const n of s.notes || []) parts.push(fact("note", n));
  document.getElementById("facts").replaceChildren(...parts);
}

function drawRecords(d) {
  const rows = [];
  for (const e of d.events) {
    for (const r of e.records.slice().reverse()) {
      const tr = el("tr", { class: "record", "data-id": r.id, "data-phase": r.phase });
      tr.appendChild(el("td", {}, r.id));
      const ph = el("td"); ph.appendChild(tag(r.phase)); tr.appendChild(ph);
      tr.appendChild(el("td", {}, r.shift_at_text));
      tr.appendChild(el("td", {}, Math.round(r.interval_level * 100) + "%: " + clockOf(Date.parse(r.shift_at_low) / 1000) +
        " to " + clockOf(Date.parse(r.shift_at_high) / 1000)));
      tr.appendChild(el("td", {}, r.detected_at_text));
      tr.appendChild(el("td", { class: "num" }, r.level_before));
      tr.appendChild(el("td", { class: "num" }, r.level_after));
      tr.appendChild(el("td", { "data-sigma": r.delta_sigma }, r.size_text));
      tr.appendChild(el("td", { class: "num" }, r.n_after));
      tr.appendChild(el("td", {}, r.as_of_text));
      rows.push(tr);
    }
  }
  if (rows.length === 0) {
    const tr = el("tr");
    tr.appendChild(el("td", { colspan: 10 }, "no records since the daemon started"));
    rows.push(tr);
  }
  document.querySelector("#records tbody").replaceChildren(...rows);
}

async function refreshStream(name) {
  try {
    const d = await getJson("/status/stream.json?name=" + encodeURIComponent(name));
    zoneName = d.time_zone_name || "UTC";
    show("generated", d.generated_text);
    show("zone", d.time_zone);
    show("advisory", d.advisory);
    show("title", d.status.label ? d.status.label + " (" + d.status.stream + ")" : d.status.stream);
    drawFacts(d);
    drawChart(d);
    drawRecords(d);
    problem("");
  } catch (e) {
    problem("The daemon did not answer (" + e.message + "); the figures below are from the last answer.");
  }
}

function startStream() {
  const name = new URLSearchParams(location.search).get("name") || "";
  document.title = "shiftwatch: " + name;
  show("title", name);
  document.getElementById("jsonlink").setAttribute("href", "/status/stream.json?name=" + encodeURIComponent(name));
  refreshStream(name);
  setInterval(() => refreshStream(name), REFRESH_MS);
}

document.addEventListener("DOMContentLoaded", () => {
  if (document.body.dataset.page === "stream") startStream(); else startOverview();
});
