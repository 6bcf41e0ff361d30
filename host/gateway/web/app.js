// Fringe live page: polls /api/site 2 s after each answer and redraws the cards.
"use strict";
const NS = "http://www.w3.org/2000/svg";
const fmt2 = (x) => (x === null || x === undefined ? "" : Number(x).toFixed(2));
const localTime = (ms) => new Date(ms).toLocaleTimeString([], { hour: "2-digit", minute: "2-digit" });
const localDateTime = (ms) => new Date(ms).toLocaleString([], { dateStyle: "short", timeStyle: "medium" });

function el(tag, cls, text) {
  const e = document.createElement(tag);
  if (cls) e.className = cls;
  if (text !== undefined) e.textContent = text;
  return e;
}

function svg(tag, attrs) {
  const e = document.createElementNS(NS, tag);
  for (const [k, v] of Object.entries(attrs)) e.setAttribute(k, v);
  return e;
}

// Trend of the last hours: moisture with its +/-2u band, flagged points,
// gaps where there is no valid value; x on the local clock.
function trend(history) {
  const W = 400, H = 120, L = 34, B = 16;
  const s = svg("svg", { class: "trend", viewBox: `0 0 ${W} ${H}`, role: "img" });
  const pts = history.filter((p) => p[1] !== null);
  if (pts.length < 2) {
    const t = svg("text", { x: L, y: H / 2 });
    t.textContent = history.length === 0
      ? "no trend yet"
      : pts.length === 0 ? "no valid value in the trend so far" : "the trend starts with the next readings";
    s.appendChild(t);
    return s;
  }
  const t0 = history[0][0], t1 = history[history.length - 1][0];
  let lo = Infinity, hi = -Infinity;
  for (const p of pts) { lo = Math.min(lo, p[1] - 2 * p[2]); hi = Math.max(hi, p[1] + 2 * p[2]); }
  if (hi - lo < 0.5) { const m = (hi + lo) / 2; lo = m - 0.25; hi = m + 0.25; }
  const x = (t) => L + ((t - t0) / Math.max(1, t1 - t0)) * (W - L - 4);
  const y = (v) => H - B - ((v - lo) / (hi - lo)) * (H - B - 6);
  s.appendChild(svg("line", { class: "axis", x1: L, y1: H - B, x2: W, y2: H - B }));
  for (const v of [lo, hi]) {
    const t = svg("text", { x: 0, y: y(v) + 3 });
    t.textContent = v.toFixed(1) + " %";
    s.appendChild(t);
  }
  for (const tt of [t0, t1]) {
    // The last label ends at the right edge, whatever its length (12:36 PM, 12:36).
    const t = svg("text", tt === t1
      ? { x: W - 2, y: H - 3, "text-anchor": "end" }
      : { x: x(tt), y: H - 3 });
    t.textContent = localTime(tt);
    s.appendChild(t);
  }
  // Runs of valid points (a missing value breaks the line).
  let run = [];
  const flush = () => {
    if (run.length > 1) {
      const up = run.map((p) => `${x(p[0])},${y(p[1] + 2 * p[2])}`);
      const dn = run.slice().reverse().map((p) => `${x(p[0])},${y(p[1] - 2 * p[2])}`);
      s.appendChild(svg("polygon", { class: "band", points: up.concat(dn).join(" ") }));
      s.appendChild(svg("polyline", { class: "line", points: run.map((p) => `${x(p[0])},${y(p[1])}`).join(" ") }));
    }
    run = [];
  };
  for (const p of history) { if (p[1] === null) flush(); else run.push(p); }
  flush();
  for (const p of pts) if (p[3] !== 0) s.appendChild(svg("circle", { class: "flagged", cx: x(p[0]), cy: y(p[1]), r: 2.2 }));
  return s;
}

// Each unit's drawn trend, kept while its points are the same (a trend
// gains a point every 10 s at most; drawing all 247 of a full site at
// every answer took most of the page's time; BENCHMARKS.md). Points are
// numbered anew in each gateway run, so the kept trends go with the run
// (mergeTrends); a gateway that numbers no points has its trends drawn at
// every answer.
const drawn = new Map();
let drawnEpoch = null;

function trendOf(u) {
  const key = u.unit + " " + u.serial;
  const h = u.history;
  const numbered = h.length === 0 || h[h.length - 1][4] !== undefined;
  const same = h.length === 0 ? "0" : h.length + " " + h[0][4] + " " + h[h.length - 1][4];
  const had = drawn.get(key);
  if (numbered && had && had.same === same) return had.svg;
  const svg = trend(h);
  // The last point drawn, for the browser test.
  svg.setAttribute("data-last", h.length ? String(h[h.length - 1][4]) : "");
  drawn.set(key, { same, svg });
  return svg;
}

function card(u) {
  const noValue = (u.status & 1) !== 0;
  const failure = (u.status & (4 | 256)) !== 0;
  const attention = (u.status & (8 | 16 | 32 | 2)) !== 0;
  const c = el("section", "card" + (noValue ? " none" : failure ? " bad" : attention ? " warn" : ""));
  c.dataset.serial = u.serial;
  const h = el("h2", null, u.tag || u.serial);
  h.appendChild(el("span", "serial", "  " + u.serial + " (unit " + u.unit + ")"));
  c.appendChild(h);
  const v = el("p", "value");
  v.dataset.role = "moisture";
  if (noValue) {
    v.textContent = "no value";
  } else {
    v.textContent = fmt2(u.moisture_pct) + " %" + (u.moisture_basis ? " " + u.moisture_basis + " basis" : "");
    v.appendChild(el("span", "unc", " \u00b1 " + fmt2(2 * u.uncertainty_pct) + " (95 %)"));
  }
  c.appendChild(v);
  const meta = [];
  if (u.temperature_c !== null) meta.push(fmt2(u.temperature_c) + " \u00b0C");
  if (u.time_ms !== null) meta.push("reading " + u.boot + "." + u.counter + " at " + localDateTime(u.time_ms));
  if (u.age_s !== null) meta.push(u.age_s + " s ago");
  c.appendChild(el("p", "meta", meta.join(" \u00b7 ")));
  const st = el("ul", "status");
  for (const w of u.status_words) {
    const li = el("li", /failure|connected/.test(w) ? "bad" : /NE 107|stale/.test(w) ? "warn" : null, w);
    st.appendChild(li);
  }
  if (!u.status_words.length) st.appendChild(el("li", null, "in order"));
  c.appendChild(st);
  if (u.flags.length) {
    const fl = el("ul", "flags");
    for (const f of u.flags) {
      const li = el("li");
      li.appendChild(el("b", null, f.name + ": "));
      li.appendChild(document.createTextNode(f.meaning + ". " + f.action + "."));
      fl.appendChild(li);
    }
    c.appendChild(fl);
  }
  c.appendChild(trendOf(u));
  if (u.alarms.length) {
    const al = el("ul", "alarms");
    for (const a of u.alarms.slice(-3).reverse()) {
      const li = el("li");
      li.appendChild(el("b", null, "Drift alarm " + localDateTime(a.time_ms) + ": "));
      li.appendChild(document.createTextNode(a.text + " " + a.advice));
      al.appendChild(li);
    }
    c.appendChild(al);
  }
  c.appendChild(el("p", "cal", "Calibration in force: " + (u.calibration || "none reported")));
  return c;
}

// When the gateway last answered (ms), for what the page says when it
// stops answering.
let lastAnswer = null;

// The gateway does not answer: the values on the page are no longer live.
// Every card turns grey with no value (a control-room screen must not go on
// showing the last values as current), and a banner says since when.
function silent(why) {
  const since = lastAnswer === null ? "the page was opened" : localDateTime(lastAnswer);
  const text = "The gateway has not answered since " + since + " (" + why + "): no value on this page is current.";
  const banner = document.getElementById("silent");
  banner.textContent = text;
  banner.hidden = false;
  for (const c of document.querySelectorAll("section.card")) {
    c.classList.remove("bad", "warn");
    c.classList.add("none");
    const v = c.querySelector('[data-role="moisture"]');
    if (v) v.textContent = "no value: the gateway has not answered since " + since;
    // Nothing of the last answer stays to be read as current: the state
    // words ("in order"), the age, the flags and the trend go too.
    for (const old of c.querySelectorAll(".meta, .flags, .trend, .alarms")) old.remove();
    const st = c.querySelector("ul.status");
    if (st) st.replaceChildren(el("li", "bad", "gateway not answering"));
  }
  document.getElementById("updated").textContent = text + " Retrying.";
}

// What the page has of each trend (by unit and serial), and where the
// gateway's numbering of trend points had got to at its last answer: the
// page asks only for the points it has not had (every trend whole every
// 2 s was 22 MB on a site of 247 devices).
const trends = new Map();
let since = null;
let partialAnswers = 0;
let wholeAsks = 0;
// How long the last answers took to merge and draw, ms (for the benchmark).
const drawMs = [];

// Adds each unit's new trend points to what the page has (each point's
// number, p[4], once), keeps as many as the gateway has, and sets the
// unit's history to the whole trend. A trend that does not come out as
// long as the gateway's (the page missed its start) is asked for whole
// next time, as is every trend after an answer of another gateway run.
function mergeTrends(site) {
  let whole = true;
  let partial = false;
  const now = new Map();
  for (const u of site.units) {
    const key = u.unit + " " + u.serial;
    let h;
    // (A gateway of a version before the marks sends no history_full:
    // its trends are whole.)
    if (u.history_full !== false) {
      h = u.history;
    } else {
      partial = true;
      const had = trends.get(key) || [];
      const last = had.length ? had[had.length - 1][4] : -1;
      h = had.concat(u.history.filter((p) => p[4] > last));
    }
    if (h.length > u.history_len) h = h.slice(h.length - u.history_len);
    if (h.length !== u.history_len) whole = false;
    now.set(key, h);
    u.history = h;
  }
  trends.clear();
  for (const [k, v] of now) trends.set(k, v);
  // Another gateway run numbers its points from 1 again: a trend of the
  // same length and numbers is another trend (found by review: the last
  // run's drawing was shown until the next point).
  if (site.epoch !== drawnEpoch) drawn.clear();
  drawnEpoch = site.epoch;
  for (const k of drawn.keys()) if (!now.has(k)) drawn.delete(k);
  since = whole ? { epoch: site.epoch, mark: site.mark } : null;
  if (partial) partialAnswers += 1;
}

// For the browser test: the trends the page holds, and how it asks.
window.__fringeTrends = () => ({ trends: Object.fromEntries(trends), since, partialAnswers, wholeAsks, drawMs });

async function refresh() {
  try {
    // A gateway that hangs without closing the connection counts as not
    // answering after 5 s without the head of its answer; the body then
    // has 60 s (every trend whole is megabytes: over a slow link to the
    // control room it took longer than 5 s, and the page never got one).
    const c = new AbortController();
    const abortAfter = (ms, why) => setTimeout(() => c.abort(new DOMException(why, "TimeoutError")), ms);
    let timer = abortAfter(5000, "no answer within 5 s");
    const query = since ? "?epoch=" + encodeURIComponent(since.epoch) + "&after=" + since.mark : "";
    if (!since) wholeAsks += 1;
    let site;
    try {
      const r = await fetch("/api/site" + query, { cache: "no-store", signal: c.signal });
      clearTimeout(timer);
      timer = abortAfter(60000, "the answer took over 60 s to arrive");
      if (!r.ok) {
        // A gateway that does not take the query (another version): ask
        // for everything next time.
        if (r.status === 400) since = null;
        throw new Error("HTTP " + r.status);
      }
      site = await r.json();
    } finally {
      clearTimeout(timer);
    }
    const drawStart = performance.now();
    mergeTrends(site);
    lastAnswer = Date.now();
    document.getElementById("silent").hidden = true;
    document.getElementById("site").textContent = site.site;
    document.title = site.site + ": live moisture";
    const main = document.getElementById("units");
    main.replaceChildren(...(site.units.length ? site.units.map(card) : [el("p", "note", "No devices in this site.")]));
    document.getElementById("updated").textContent = "Updated " + new Date().toLocaleTimeString() + ".";
    drawMs.push(performance.now() - drawStart);
    if (drawMs.length > 100) drawMs.shift();
  } catch (e) {
    silent(String(e.message || e));
  }
}

setInterval(() => { document.getElementById("clock").textContent = new Date().toLocaleString(); }, 1000);
// The next poll 2 s after an answer (or its 5 s timeout), so that slow
// answers do not pile up.
async function poll() {
  try {
    await refresh();
  } finally {
    setTimeout(poll, 2000);
  }
}
poll();
