// The live page: reads /v1/pulse every POLL_MS and redraws tables and SVG
// charts. Server text is only ever set as textContent, never parsed as HTML.
"use strict";

const POLL_MS = 2000;
const SVG = "http://www.w3.org/2000/svg";
const CHART_HEIGHT = 150;
const PAD = { left: 46, right: 10, top: 10, bottom: 22 };

// route: the route whose latency is drawn; chosen: whether a person picked it
// (until then the reward route is preferred as soon as it has traffic).
const state = { paused: false, timer: null, last: null, route: null, chosen: false };

function $(id) { return document.getElementById(id); }

function fmt(x, digits) {
  if (x === null || x === undefined || Number.isNaN(x)) return "–";
  if (digits !== undefined) return x.toFixed(digits);
  const a = Math.abs(x);
  if (a === 0) return "0";
  if (a < 10) return x.toFixed(a < 1 ? 2 : 1);
  return Math.round(x).toLocaleString("en");
}

function pct(x) { return x === null || x === undefined ? "–" : (100 * x).toFixed(1) + " %"; }

function el(tag, text, cls) {
  const e = document.createElement(tag);
  if (text !== undefined && text !== null) e.textContent = String(text);
  if (cls) e.className = cls;
  return e;
}

function row(cells) {
  const tr = document.createElement("tr");
  for (const c of cells) {
    const numeric = typeof c === "number" || (c && c.num);
    const td = el("td", c && c.text !== undefined ? c.text : c, numeric ? "num" : (c && c.cls) || "");
    if (c && c.title) td.title = c.title;
    tr.appendChild(td);
  }
  return tr;
}

function fill(tbody, rows, empty, width) {
  tbody.replaceChildren();
  if (rows.length === 0) {
    const td = el("td", empty);
    td.colSpan = width;
    const tr = document.createElement("tr");
    tr.appendChild(td);
    tbody.appendChild(tr);
    return;
  }
  for (const r of rows) tbody.appendChild(row(r));
}

function num(x, digits) { return { text: fmt(x, digits), num: true }; }

function svgEl(tag, attrs, text) {
  const e = document.createElementNS(SVG, tag);
  for (const [k, v] of Object.entries(attrs)) e.setAttribute(k, String(v));
  if (text !== undefined) e.textContent = text;
  return e;
}

function niceMax(v) {
  if (!(v > 0)) return 1;
  const p = Math.pow(10, Math.floor(Math.log10(v)));
  for (const m of [1, 2, 2.5, 5, 10]) if (m * p >= v) return m * p;
  return 10 * p;
}

// series: [{name, values: [number|null], colour: 0..5, dash: 0..3}]; times in ms,
// or other x values with `axis` = {left, right} naming the ends of the x axis.
function chart(box, title, unit, times, series, axis) {
  const width = Math.max(240, box.clientWidth || 600);
  const svg = svgEl("svg", { width, height: CHART_HEIGHT, viewBox: `0 0 ${width} ${CHART_HEIGHT}`, role: "img" });
  const label = `${title}: ` + series.map((s) => {
    const last = [...s.values].reverse().find((v) => v !== null && v !== undefined);
    return `${s.name} ${last === undefined ? "no data" : fmt(last) + " " + unit}`;
  }).join(", ");
  svg.setAttribute("aria-label", label);
  svg.appendChild(svgEl("title", {}, label));
  const innerW = width - PAD.left - PAD.right;
  const innerH = CHART_HEIGHT - PAD.top - PAD.bottom;
  const all = series.flatMap((s) => s.values).filter((v) => v !== null && v !== undefined);
  const top = niceMax(Math.max(0, ...all));
  // Below zero (a reward can be), the axis reaches down to a round value too.
  const low = Math.min(0, ...all);
  const bottom = low < 0 ? -niceMax(-low) : 0;
  const y = (v) => PAD.top + innerH * (1 - (v - bottom) / (top - bottom));
  const t0 = times.length ? times[0] : 0;
  const t1 = times.length ? times[times.length - 1] : 1;
  const x = (t) => PAD.left + (t1 > t0 ? innerW * (t - t0) / (t1 - t0) : innerW);
  const ticks = bottom < 0 ? [bottom, 0, top] : [0, top / 2, top];
  for (const v of ticks) {
    const yy = y(v);
    svg.appendChild(svgEl("line", { x1: PAD.left, x2: width - PAD.right, y1: yy, y2: yy, class: v === 0 ? "axis" : "grid" }));
    svg.appendChild(svgEl("text", { x: PAD.left - 4, y: yy + 4, "text-anchor": "end" }, fmt(v)));
  }
  const ends = axis || {
    left: times.length > 1 ? `−${Math.round((t1 - t0) / 1000)} s` : "",
    right: `now · ${unit}`,
  };
  svg.appendChild(svgEl("text", { x: PAD.left, y: CHART_HEIGHT - 6 }, ends.left));
  svg.appendChild(svgEl("text", { x: width - PAD.right, y: CHART_HEIGHT - 6, "text-anchor": "end" }, ends.right));
  if (all.length === 0) {
    svg.appendChild(svgEl("text", { x: PAD.left + innerW / 2, y: PAD.top + innerH / 2, "text-anchor": "middle", class: "empty" }, "no data yet"));
  }
  for (const s of series) {
    // A gap (null) ends a segment: no line is drawn through missing data, and
    // a point with no neighbour is drawn as a dot.
    const segments = [];
    let open = null;
    s.values.forEach((v, i) => {
      if (v === null || v === undefined) { open = null; return; }
      if (open === null) { open = []; segments.push(open); }
      open.push([x(times[i]), y(v)]);
    });
    const cls = `s${s.colour}` + (s.dash ? ` dash${s.dash}` : "");
    for (const seg of segments) {
      if (seg.length === 1) {
        svg.appendChild(svgEl("circle", { cx: seg[0][0].toFixed(1), cy: seg[0][1].toFixed(1), r: 3, class: `dot s${s.colour}` }));
      } else {
        const d = seg.map(([px, py], i) => `${i ? "L" : "M"}${px.toFixed(1)},${py.toFixed(1)}`).join("");
        svg.appendChild(svgEl("path", { d, class: `line ${cls}` }));
      }
    }
  }
  box.replaceChildren(svg);
}

function legend(box, series) {
  box.replaceChildren(...series.map((s) => {
    const span = el("span");
    span.appendChild(el("i", null, `c${s.colour}` + (s.dash ? ` d${s.dash}` : "")));
    span.appendChild(document.createTextNode(s.name));
    return span;
  }));
}

// A figure `plot-NAME` in the page holds its title; the chart and legend are added here.
// `cls` finds the part again; `also` are classes it carries besides.
function part(figure, tag, cls, also) {
  let e = figure.querySelector(`.${cls}`);
  if (!e) { e = el(tag, null, also ? `${also} ${cls}` : cls); figure.appendChild(e); }
  return e;
}

function plot(name, title, unit, times, series) {
  const figure = $(`plot-${name}`);
  chart(part(figure, "div", "chart"), title, unit, times, series);
  legend(part(figure, "figcaption", "legend"), series);
}

function towerKey(t) { return `${t.model} ${t.tower}`; }

function renderModels(p) {
  const rows = p.models.map((m) => [
    m.id,
    { text: m.digest.slice(0, 12) + "…", title: m.digest },
    m.dimension,
    { text: m.ready ? "ready" : "loading", cls: m.ready ? "ready" : "" },
  ]);
  fill($("models").tBodies[0], rows, p.status === "loading" ? "bundles are loading…" : "no model loaded", 4);
}

function renderThroughput(p) {
  const c = p.current;
  const rewards = c.routes["/v1/rewards"];
  $("captions-rate").textContent = fmt(c.captions_per_s);
  $("images-rate").textContent = fmt(c.images_per_s);
  $("rewards-rate").textContent = fmt(rewards ? rewards.requests_per_s : 0);
  $("refused-rate").textContent = fmt(c.overloaded_per_s);
  $("window-note").textContent = `over the last ${Math.round(c.seconds)} s`;
  const s = p.since_start;
  const count = (rate) => Math.round(rate * s.seconds).toLocaleString("en");
  $("totals").textContent = `Since start (${Math.round(s.seconds)} s): ${count(s.captions_per_s)} captions, ` +
    `${count(s.images_per_s)} images, ${count(s.requests_per_s)} requests, ${count(s.overloaded_per_s)} answered 503.`;
  const h = p.history;
  const times = h.map((w) => w.end_unix_ms);
  plot("throughput", "Throughput", "per s", times, [
    { name: "captions/s", values: h.map((w) => w.captions_per_s), colour: 0, dash: 0 },
    { name: "images/s", values: h.map((w) => w.images_per_s), colour: 2, dash: 1 },
  ]);
  plot("requests", "Requests", "per s", times, [
    { name: "reward requests/s", values: h.map((w) => (w.routes["/v1/rewards"] || { requests_per_s: 0 }).requests_per_s), colour: 0, dash: 0 },
    { name: "503 answers/s (all routes)", values: h.map((w) => w.overloaded_per_s), colour: 1, dash: 1 },
  ]);
}

function renderLatency(p) {
  const routes = Object.keys(p.current.routes).sort();
  const select = $("route");
  if (!state.chosen || !routes.includes(state.route)) {
    state.route = routes.includes("/v1/rewards") ? "/v1/rewards" : (routes[0] || null);
  }
  const have = [...select.options].map((o) => o.value).join("\n");
  if (have !== routes.join("\n")) {
    select.replaceChildren(...routes.map((r) => { const o = el("option", r); o.value = r; return o; }));
  }
  if (state.route !== null) select.value = state.route;
  const h = p.history;
  const pick = (w) => w.routes[state.route] || {};
  $("plot-latency").querySelector("h3").textContent = `Latency of ${state.route || "no route yet"}, ms`;
  plot("latency", `Latency of ${state.route || "no route"}`, "ms", h.map((w) => w.end_unix_ms), [
    { name: "p50", values: h.map((w) => pick(w).p50_ms ?? null), colour: 0, dash: 0 },
    { name: "p99", values: h.map((w) => pick(w).p99_ms ?? null), colour: 1, dash: 1 },
  ]);
  const rows = routes.map((r) => {
    const w = p.current.routes[r];
    return [r, num(w.requests_per_s), num(w.p50_ms), num(w.p90_ms), num(w.p99_ms), num(w.overloaded_per_s)];
  });
  fill($("routes").tBodies[0], rows, "no requests yet", 6);
}

function renderEncoders(p) {
  const rows = p.current.towers.map((t) => [
    t.model, t.tower, num(t.items_per_s), num(t.batch_mean), num(t.p50_ms), num(t.p99_ms), num(t.queue_depth, 0),
  ]);
  fill($("towers").tBodies[0], rows, "no encoder has run yet", 7);
  const h = p.history;
  const keys = [...new Set(h.flatMap((w) => w.towers.map(towerKey)))].sort();
  const series = (field) => keys.map((k, i) => ({
    name: k,
    values: h.map((w) => { const t = w.towers.find((x) => towerKey(x) === k); return t ? t[field] : null; }),
    colour: i % 6,
    dash: i % 4,
  }));
  const times = h.map((w) => w.end_unix_ms);
  plot("batch", "Mean batch size", "items", times, series("batch_mean"));
  plot("queue", "Queue depth", "jobs", times, series("queue_depth"));
}

function renderCaches(p) {
  const names = Object.keys(p.since_start.caches).sort();
  const rows = names.map((n) => {
    const now = p.current.caches[n] || {};
    const all = p.since_start.caches[n];
    return [n, { text: pct(now.hit_rate), num: true }, { text: pct(all.hit_rate), num: true }, num(all.hits, 0), num(all.misses, 0)];
  });
  fill($("cache-table").tBodies[0], rows, "no lookups yet", 5);
}

function renderBank(p) {
  const b = p.bank;
  if (!b) {
    $("bank-summary").textContent = "The caption bank is loading.";
    fill($("bank-indexes").tBodies[0], [], "loading…", 6);
    $("bank-tags").textContent = "";
    return;
  }
  const size = b.file_bytes < 1048576 ? `${(b.file_bytes / 1024).toFixed(0)} KiB` : `${(b.file_bytes / 1048576).toFixed(1)} MiB`;
  const tags = Object.entries(b.tags).sort((a, c) => c[1] - a[1]);
  $("bank-summary").textContent = `${b.captions.toLocaleString("en")} captions, ${tags.length} tag${tags.length === 1 ? "" : "s"}, ${size} on disk.`;
  const when = (ms) => (ms ? new Date(ms).toLocaleTimeString("en-GB") : "never");
  const rows = b.models.map((x) => [
    x.model ? x.model.id : x.index.digest.slice(0, 12) + "…",
    num(x.index.rows, 0), num(x.index.indexed, 0), num(x.index.dumped_rows, 0),
    when(x.index.last_dump_unix_ms),
    x.backfill ? `${x.backfill.phase} ${x.backfill.embedded}/${x.backfill.missing}` : "none needed",
  ]);
  fill($("bank-indexes").tBodies[0], rows, "no index loaded", 6);
  $("bank-tags").textContent = tags.length
    ? "Captions by tag: " + tags.map(([t, n]) => `${t} ${n.toLocaleString("en")}`).join(" · ")
    : "No tags yet.";
}

// One figure per watched run, made on first sight and kept (so focus and
// scrolling survive a redraw); a run that left the pulse loses its figure.
function runFigure(name) {
  const box = $("run-plots");
  for (const f of box.children) if (f.dataset.run === name) return f;
  const figure = el("figure", null, "run");
  figure.dataset.run = name;
  figure.appendChild(el("h3", `Run ${name}`));
  box.appendChild(figure);
  return figure;
}

function renderRuns(p) {
  const runs = p.runs || [];
  $("runs-summary").textContent = runs.length
    ? (runs.length === 1 ? "One run, with up to its last 200 steps."
      : `The ${runs.length} most recently updated runs, with up to their last 200 steps.`)
    : "No run has been named yet: send \"run\" and \"step\" with /v1/rewards to watch one.";
  const rows = runs.map((r) => {
    const last = r.series[r.series.length - 1] || null;
    const v = (f) => (last ? f(last) : null);
    const warned = r.warnings.map((w) => `${w.signal} ${fmt(w.value)} (limit ${fmt(w.threshold)})`).join("; ");
    return [
      r.name, num(r.latest_step, 0), num(r.samples, 0),
      num(v((s) => s.reward.mean)), num(v((s) => s.cosine.mean)),
      { text: pct(v((s) => s.repeated_words)), num: true }, num(v((s) => s.distinct_2)),
      { text: warned || "none", cls: warned ? "warn" : "" },
    ];
  });
  fill($("runs-table").tBodies[0], rows, "no runs yet", 8);
  const names = new Set(runs.map((r) => r.name));
  for (const f of [...$("run-plots").children]) if (!names.has(f.dataset.run)) f.remove();
  for (const r of runs) {
    const figure = runFigure(r.name);
    const steps = r.series.map((s) => s.step);
    const axis = { left: steps.length ? `step ${steps[0]}` : "", right: steps.length ? `step ${steps[steps.length - 1]}` : "" };
    const pick = (f) => r.series.map(f);
    const scores = [
      { name: "reward (mean)", values: pick((s) => s.reward.mean), colour: 0 },
      { name: "cosine (mean)", values: pick((s) => s.cosine.mean), colour: 1, dash: 1 },
    ];
    const words = [
      { name: "repeated words", values: pick((s) => s.repeated_words), colour: 2 },
      { name: "distinct-2", values: pick((s) => s.distinct_2), colour: 3, dash: 2 },
    ];
    chart(part(figure, "div", "scores", "chart"), `Run ${r.name}: reward and cosine per step`, "", steps, scores, axis);
    chart(part(figure, "div", "words", "chart"), `Run ${r.name}: repetition and distinct-2 per step`, "", steps, words, axis);
    legend(part(figure, "figcaption", "legend"), [...scores, ...words]);
  }
}

function render(p) {
  const status = $("status");
  status.classList.remove("bad");
  const n = p.models.length;
  status.textContent = p.status === "ready"
    ? `Ready · ${n} model${n === 1 ? "" : "s"} · updated ${new Date(p.current.end_unix_ms).toLocaleTimeString("en-GB")}`
    : "Loading bundles…";
  renderModels(p);
  renderThroughput(p);
  renderLatency(p);
  renderEncoders(p);
  renderCaches(p);
  renderBank(p);
  renderRuns(p);
}

async function poll() {
  state.timer = null;
  try {
    const r = await fetch(`/v1/pulse?seconds=${$("span").value}`, { cache: "no-store" });
    if (!r.ok) throw new Error(`HTTP ${r.status}`);
    state.last = await r.json();
    render(state.last);
  } catch (e) {
    const status = $("status");
    status.classList.add("bad");
    status.textContent = `Cannot read /v1/pulse (${e.message}); retrying.`;
  }
  if (!state.paused) schedule(POLL_MS);
}

// One timer at most: a new schedule replaces the pending one.
function schedule(delay) {
  if (state.timer !== null) clearTimeout(state.timer);
  state.timer = setTimeout(poll, delay);
}

function setup() {
  $("pause").addEventListener("click", () => {
    state.paused = !state.paused;
    const b = $("pause");
    b.setAttribute("aria-pressed", String(state.paused));
    b.textContent = state.paused ? "Resume" : "Pause";
    if (state.paused && state.timer !== null) { clearTimeout(state.timer); state.timer = null; }
    if (!state.paused) schedule(0);
  });
  $("span").addEventListener("change", () => { if (!state.paused) schedule(0); });
  $("route").addEventListener("change", (e) => {
    state.route = e.target.value;
    state.chosen = true;
    if (state.last) renderLatency(state.last);
  });
  let resize = null;
  window.addEventListener("resize", () => {
    clearTimeout(resize);
    resize = setTimeout(() => { if (state.last) render(state.last); }, 150);
  });
  poll();
}

setup();
