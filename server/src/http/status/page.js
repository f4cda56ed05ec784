// The status page's script: signs in with the admin token (kept in sessionStorage only), polls
// this server's admin API and /metrics once a second, and draws tables and small SVG charts.
// The last hour's charts come from the server's own samples (/admin/history: fetched whole on
// sign-in, then only the new ones), so they cover the hour before the page was opened too.
// It builds every element with createElement and textContent, never from HTML strings, so a
// name in the store cannot inject markup. Nothing is fetched from anywhere but this origin.
"use strict";

const TOKEN_KEY = "switchyard-status-token";
const POLL_MS = 1000;
const HISTORY_MS = 60 * 60 * 1000;
const TIER_RANK = { disk: 0, factors: 1, merged: 2 };
const SVG_NS = "http://www.w3.org/2000/svg";

const view = {
  sortKey: "name",
  sortDir: 1,
  filter: "",
  history: [], // {t, requests, errors: {adapter: count}}: this page's own readings, for rates
  samples: [], // the server's samples of the last hour (GET /admin/history), oldest first
  sampleMs: 0, // the interval the server samples at
  timer: null,
  generation: 0,
};

const $ = (id) => document.getElementById(id);

function el(tag, attrs, ...children) {
  const node = document.createElement(tag);
  for (const [k, v] of Object.entries(attrs || {})) {
    if (v === undefined || v === null || v === false) continue;
    if (k === "class") node.className = v;
    else node.setAttribute(k, v === true ? "" : String(v));
  }
  for (const c of children) {
    if (c === null || c === undefined) continue;
    node.append(c instanceof Node ? c : String(c));
  }
  return node;
}

function svg(tag, attrs, ...children) {
  const node = document.createElementNS(SVG_NS, tag);
  for (const [k, v] of Object.entries(attrs || {})) node.setAttribute(k, String(v));
  for (const c of children) node.append(c instanceof Node ? c : String(c));
  return node;
}

function bytes(n) {
  if (n === null || n === undefined) return "-";
  const units = ["B", "KiB", "MiB", "GiB", "TiB"];
  let i = 0;
  let x = n;
  while (x >= 1024 && i < units.length - 1) { x /= 1024; i += 1; }
  return (i === 0 ? x : x.toFixed(x < 10 ? 2 : 1)) + " " + units[i];
}

function ago(t) {
  const s = Math.max(0, Math.round((Date.now() - t) / 1000));
  return s < 60 ? `${s} s ago` : s < 3600 ? `${Math.floor(s / 60)} min ago` : `${Math.floor(s / 3600)} h ago`;
}

function shortVersion(v) { return v ? v.slice(0, 12) : "-"; }

function num(x, digits) {
  if (x === null || x === undefined || !Number.isFinite(x)) return "-";
  return Math.abs(x) >= 1e5 || (Math.abs(x) < 1e-3 && x !== 0) ? x.toExponential(2) : x.toFixed(digits ?? 3);
}

// ---- signing in -------------------------------------------------------------------------------

class Refused extends Error {}

async function api(path, asText) {
  const token = sessionStorage.getItem(TOKEN_KEY);
  const resp = await fetch(path, {
    headers: { Authorization: "Bearer " + token },
    cache: "no-store",
    credentials: "omit",
  });
  if (resp.status === 401 || resp.status === 403) {
    const body = await resp.json().catch(() => ({}));
    throw new Refused((body.error && body.error.message) || "status " + resp.status);
  }
  if (!resp.ok) throw new Error(path + " answered " + resp.status);
  return asText ? resp.text() : resp.json();
}

function showSignIn(message) {
  clearTimeout(view.timer);
  view.generation += 1;
  $("board").hidden = true;
  $("sign-out").hidden = true;
  $("sign-in").hidden = false;
  $("freshness").textContent = "not signed in";
  const error = $("sign-in-error");
  error.hidden = !message;
  error.textContent = message || "";
  $("token").focus();
}

function showBoard() {
  $("sign-in").hidden = true;
  $("board").hidden = false;
  $("sign-out").hidden = false;
  view.history = [];
  view.samples = [];
  view.generation += 1;
  poll(view.generation);
}

// ---- polling ----------------------------------------------------------------------------------

// Parses the Prometheus text of /metrics into [{name, labels, value}].
function parseMetrics(text) {
  const out = [];
  for (const line of text.split("\n")) {
    if (!line || line.startsWith("#")) continue;
    const m = /^([a-zA-Z_:][\w:]*)(\{(.*)\})?\s+(\S+)/.exec(line);
    if (!m) continue;
    const labels = {};
    if (m[3]) for (const l of m[3].matchAll(/(\w+)="((?:[^"\\]|\\.)*)"/g)) labels[l[1]] = l[2];
    out.push({ name: m[1], labels, value: Number(m[4]) });
  }
  return out;
}

async function poll(generation) {
  const started = Date.now();
  try {
    const last = view.samples[view.samples.length - 1];
    const [adapters, splits, metricsText, recent] = await Promise.all([
      api("/admin/adapters"), api("/admin/splits"), api("/metrics", true),
      api("/admin/history" + (last ? "?since_ms=" + last.at_ms : "")),
    ]);
    const readouts = await Promise.all(splits.splits.map((s) =>
      api("/admin/splits/" + encodeURIComponent(s.name) + "/readout").catch(() => null)));
    if (generation !== view.generation) return;
    view.sampleMs = recent.interval_ms;
    view.samples.push(...recent.samples);
    while (view.samples.length && view.samples[0].at_ms < recent.now_ms - HISTORY_MS) view.samples.shift();
    render(adapters, splits.splits, readouts, parseMetrics(metricsText));
    $("freshness").textContent = "updated " + new Date().toLocaleTimeString();
  } catch (err) {
    if (generation !== view.generation) return;
    if (err instanceof Refused) {
      sessionStorage.removeItem(TOKEN_KEY);
      showSignIn("The server refused that token (" + err.message + ").");
      return;
    }
    $("freshness").textContent = "could not reach the server (" + err.message + "); retrying";
  }
  if (generation !== view.generation) return;
  view.timer = setTimeout(() => poll(generation), Math.max(0, POLL_MS - (Date.now() - started)));
}

// ---- drawing ----------------------------------------------------------------------------------

function render(adapters, splits, readouts, metrics) {
  const now = Date.now();
  const requests = {};
  const errors = {};
  let queue = 0;
  for (const m of metrics) {
    if (m.name === "switchyard_requests_total") {
      const a = m.labels.adapter;
      requests[a] = (requests[a] || 0) + m.value;
      if (Number(m.labels.status) >= 400) errors[a] = (errors[a] || 0) + m.value;
    } else if (m.name === "switchyard_queue_depth") {
      queue = m.value;
    }
  }
  const mem = adapters.memory;
  view.history.push({ t: now, requests, errors });
  while (view.history.length && view.history[0].t < now - 2 * 60 * 1000) view.history.shift();

  const base = adapters.base;
  $("base-weights").textContent = base.weights;
  $("base-kernels").textContent = base.kernels;
  $("base-library").textContent = base.library || "none: our own kernels only";
  $("base-bytes").textContent = bytes(base.weight_bytes);
  $("queue-depth").textContent = String(queue);
  $("queue-chart").replaceChildren(sparkline([...view.samples.map((s) => s.queued), queue],
    "queued requests over the last hour", "var(--blue)"));

  renderMemory(mem, metrics);
  renderSwaps(metrics);
  view.last = [adapters.adapters, requests, errors];
  renderAdapters(...view.last);
  renderSplits(splits, readouts);
}

// Histogram families of /metrics by one label: {value: {buckets: [[le, cumulative]], sum, count}}.
function histograms(metrics, name, label) {
  const out = {};
  const get = (m) => (out[label ? m.labels[label] : ""] ||= { buckets: [], sum: 0, count: 0 });
  for (const m of metrics) {
    if (m.name === name + "_bucket") get(m).buckets.push([Number(m.labels.le), m.value]);
    else if (m.name === name + "_sum") get(m).sum = m.value;
    else if (m.name === name + "_count") get(m).count = m.value;
  }
  return out;
}

function seconds(x) {
  if (!Number.isFinite(x)) return "-";
  return x < 1 ? (x * 1000).toFixed(x < 0.01 ? 2 : 1) + " ms" : x.toFixed(2) + " s";
}

const mean = (h) => (h && h.count ? h.sum / h.count : NaN);

// One histogram's bucket counts (not cumulative) as bars, one per finite bucket.
function histogramBars(h, label) {
  const finite = h.buckets.filter(([le]) => Number.isFinite(le)).sort((a, b) => a[0] - b[0]);
  const counts = finite.map(([, c], i) => c - (i ? finite[i - 1][1] : 0));
  const w = 180, hgt = 28, bw = w / Math.max(1, counts.length);
  const max = Math.max(1, ...counts);
  return svg("svg", { viewBox: `0 0 ${w} ${hgt}`, role: "img", "aria-label": label },
    svg("title", {}, label),
    svg("line", { x1: 0, y1: hgt - 0.5, x2: w, y2: hgt - 0.5, stroke: "#d8d4ca" }),
    ...counts.map((c, i) => svg("rect", { x: (i * bw + 0.5).toFixed(1), width: Math.max(1, bw - 1).toFixed(1),
      y: (hgt - 1 - (c / max) * (hgt - 2)).toFixed(1), height: ((c / max) * (hgt - 2)).toFixed(1), fill: "#0072b2" })));
}

function renderSwaps(metrics) {
  const stages = histograms(metrics, "switchyard_swap_seconds", "stage");
  const order = ["read", "validate", "convert", "load", "merge"];
  const names = [...order.filter((s) => stages[s]), ...Object.keys(stages).filter((s) => !order.includes(s))];
  $("swaps").tBodies[0].replaceChildren(...names.map((stage) => {
    const h = stages[stage];
    return el("tr", { "data-stage": stage },
      el("th", { scope: "row" }, stage),
      el("td", { class: "num", "data-col": "count" }, h.count),
      el("td", { class: "num", "data-col": "mean" }, seconds(mean(h))),
      el("td", { class: "chart hist" }, histogramBars(h, `${stage}: ${h.count} swaps`)));
  }));
  const one = (name) => histograms(metrics, name, null)[""];
  const rows = one("switchyard_batch_rows");
  $("batch-rows").textContent = rows && rows.count ? (rows.sum / rows.count).toFixed(2) : "-";
  $("first-token").textContent = seconds(mean(one("switchyard_first_token_seconds")));
  $("request-time").textContent = seconds(mean(one("switchyard_request_seconds")));
  const starts = histograms(metrics, "switchyard_adapter_answer_seconds", "start");
  const measures = [
    ["first-token", "First token", one("switchyard_first_token_seconds"), seconds],
    ["request", "Whole generation", one("switchyard_request_seconds"), seconds],
    ["cold", "Cold answer (adapter loaded for it)", starts.cold, seconds],
    ["warm", "Warm answer (adapter resident)", starts.warm, seconds],
    ["batch-rows", "Rows per pass", rows, (x) => (Number.isFinite(x) ? x.toFixed(2) : "-")],
  ];
  $("timings").tBodies[0].replaceChildren(...measures.map(([key, label, h, show]) => {
    const count = h ? h.count : 0;
    return el("tr", { "data-measure": key },
      el("th", { scope: "row" }, label),
      el("td", { class: "num", "data-col": "count" }, count),
      el("td", { class: "num", "data-col": "mean" }, show(mean(h))),
      el("td", { class: "chart hist" }, h ? histogramBars(h, `${label}: ${count}`) : "no data yet"));
  }));
  const cache = { hit: 0, miss: 0, eviction: 0 };
  for (const m of metrics) {
    if (m.name === "switchyard_cache_events_total" && m.labels.outcome in cache) cache[m.labels.outcome] += m.value;
  }
  $("cache-use").textContent = `${cache.miss} / ${cache.hit}`;
  $("evictions").textContent = String(cache.eviction);
  const s = view.samples;
  const perSample = s.map((x, i) => (i ? Math.max(0, x.evictions - s[i - 1].evictions) : 0));
  const every = Math.round(view.sampleMs / 1000);
  $("eviction-chart").replaceChildren(sparkline(perSample, `evictions per ${every} s, over the last hour`,
    "var(--vermillion)"));
}

function sparkline(values, label, colour) {
  const w = 300, h = 40;
  const max = Math.max(1, ...values);
  const step = values.length > 1 ? w / (values.length - 1) : w;
  const points = values.map((v, i) => (i * step).toFixed(1) + "," + (h - 2 - (v / max) * (h - 4)).toFixed(1)).join(" ");
  return svg("svg", { viewBox: `0 0 ${w} ${h}`, role: "img", "aria-label": label, class: "spark", preserveAspectRatio: "none" },
    svg("title", {}, label + ", last " + values.length + " readings, highest " + max),
    svg("line", { x1: 0, y1: h - 1, x2: w, y2: h - 1, stroke: "#d8d4ca", "vector-effect": "non-scaling-stroke" }),
    svg("polyline", { points, fill: "none", stroke: colour, "stroke-width": 2, "vector-effect": "non-scaling-stroke" }));
}

function renderMemory(mem, metrics) {
  const box = $("memory");
  box.replaceChildren();
  const tiers = [["factors", "var(--blue)"], ["merged", "var(--orange)"]];
  // The package cache in front of an object store, when there is one.
  const disk = metrics.find((m) => m.name === "switchyard_resident_bytes" && m.labels.tier === "disk");
  const diskLimit = metrics.find((m) => m.name === "switchyard_package_cache_limit_bytes");
  if (disk && diskLimit && diskLimit.value > 0) {
    mem = { ...mem, disk: { bytes: disk.value, budget_bytes: diskLimit.value, entries: null } };
    tiers.unshift(["disk", "var(--sky)"]);
  }
  for (const [tier, colour] of tiers) {
    const t = mem[tier];
    const share = t.budget_bytes > 0 ? Math.min(1, t.bytes / t.budget_bytes) : 0;
    const w = 300, h = 18;
    const bar = svg("svg", { viewBox: `0 0 ${w} ${h}`, role: "img",
      "aria-label": `${tier}: ${bytes(t.bytes)} of ${bytes(t.budget_bytes)}` },
      svg("rect", { x: 0, y: 0, width: w, height: h, fill: "#eeebe4", stroke: "#5b6169" }),
      svg("rect", { x: 0, y: 0, width: (share * w).toFixed(1), height: h, fill: colour }));
    const history = sparkline([...view.samples.map((x) => x[tier + "_bytes"] ?? 0), t.bytes],
      tier + " bytes over the last hour", colour);
    box.append(el("div", { class: "bar-row", "data-tier": tier },
      el("span", { class: "bar-label" }, el("span", { class: "tier tier-" + tier }, tier)),
      el("div", { class: "chart" }, bar),
      el("span", { class: "bar-note" },
        `${bytes(t.bytes)} of ${bytes(t.budget_bytes)} (${(share * 100).toFixed(1)}%)` +
          (t.entries === null ? "" : `, ${t.entries} held`)),
      el("div", { class: "chart bar-note" }, history)));
  }
}

function adapterRows(adapters, requests, errors) {
  const hourAgo = view.history.find((h) => h.t >= Date.now() - 60 * 1000) || view.history[0];
  const spanMin = hourAgo ? Math.max(1 / 60, (Date.now() - hourAgo.t) / 60000) : 1;
  return adapters.map((a) => {
    const live = a.resident.filter((r) => r.version === a.live);
    const top = live.reduce((best, r) => (TIER_RANK[r.tier] > TIER_RANK[best] ? r.tier : best), "disk");
    const req = requests[a.name] || 0;
    const before = hourAgo && hourAgo.requests[a.name] ? hourAgo.requests[a.name] : 0;
    const err = errors[a.name] || 0;
    const errBefore = hourAgo && hourAgo.errors[a.name] ? hourAgo.errors[a.name] : 0;
    return {
      name: a.name,
      live: a.live || "",
      others: a.versions.filter((v) => v.version !== a.live).map((v) => v.version),
      tier: top,
      residentTiers: a.resident.map((r) => `${shortVersion(r.version)} ${r.tier}`),
      bytes: a.resident.reduce((s, r) => s + r.bytes, 0),
      pinned: a.pinned,
      tenants: (a.tenants || []).map((t) => `${t.tenant} (${t.patterns.join(", ")})`).join("; "),
      requests: req,
      errors: err,
      rate: Math.max(0, req - before) / spanMin,
      errorRate: Math.max(0, err - errBefore) / spanMin,
      lastUsed: a.last_used_ms || 0,
    };
  });
}

function renderAdapters(adapters, requests, errors) {
  const rows = adapterRows(adapters, requests, errors);
  const f = view.filter.trim().toLowerCase();
  const shown = rows.filter((r) => !f || [r.name, r.live, r.tier, r.tenants, ...r.others].some((s) => s.toLowerCase().includes(f)));
  const key = view.sortKey;
  const value = (r) => (key === "others" ? r.others.length : key === "tier" ? TIER_RANK[r.tier] : r[key]);
  shown.sort((a, b) => {
    const x = value(a), y = value(b);
    const c = typeof x === "string" ? x.localeCompare(y) : Number(x) - Number(y);
    return (c || a.name.localeCompare(b.name)) * view.sortDir;
  });
  $("adapter-count").textContent = `(${shown.length} of ${rows.length})`;
  const body = $("adapters").tBodies[0];
  body.replaceChildren(...shown.map((r) => el("tr", { "data-adapter": r.name },
    el("th", { scope: "row" }, r.name),
    el("td", { "data-col": "live", title: r.live }, el("code", {}, shortVersion(r.live))),
    el("td", { "data-col": "others", title: r.others.join("\n") },
      r.others.length ? r.others.length + ": " + r.others.map(shortVersion).join(", ") : "none"),
    el("td", { "data-col": "tier", title: r.residentTiers.join("\n") || "nothing resident" },
      el("span", { class: "tier tier-" + r.tier }, r.tier)),
    el("td", { class: "num", "data-col": "bytes" }, bytes(r.bytes)),
    el("td", { "data-col": "pinned" }, r.pinned ? "pinned" : "no"),
    el("td", { "data-col": "tenants" }, r.tenants || "no tenant"),
    el("td", { class: "num", "data-col": "requests" }, r.requests),
    el("td", { class: "num", "data-col": "errors" }, r.errors),
    el("td", { class: "num", "data-col": "rate" }, r.rate.toFixed(1)),
    el("td", { class: "num", "data-col": "error-rate" }, r.errorRate.toFixed(1)),
    el("td", { "data-col": "last-used", title: r.lastUsed ? new Date(r.lastUsed).toISOString() : "no request since the server started" },
      r.lastUsed ? ago(r.lastUsed) : "never"))));
  if (!shown.length) {
    body.append(el("tr", {}, el("td", { colspan: 12 }, rows.length ? "No adapter matches the filter." : "The store holds no adapters.")));
  }
}

// The comparison a watched readout should show: the always-valid one where it exists.
function comparison(kind) {
  if (!kind) return null;
  const watched = kind.versus_first_always_valid;
  if (watched && watched.interval) return { ...watched, label: "always valid" };
  const fixed = kind.versus_first;
  if (fixed && fixed.interval) return { ...fixed, label: "fixed sample" };
  return null;
}

function outcomeKind(readout) {
  const count = (k) => readout.arms.reduce((s, a) => s + ((a[k] && a[k].summary && a[k].summary.count) || 0), 0);
  return count("yes_no") > count("numeric") ? "yes_no" : "numeric";
}

function renderSplits(splits, readouts) {
  const box = $("splits");
  if (!splits.length) { box.replaceChildren(el("p", { class: "thin" }, "No splits.")); return; }
  box.replaceChildren(...splits.map((s, i) => renderSplit(s, readouts[i])));
}

function renderSplit(split, readout) {
  const node = el("article", { class: "split", "data-split": split.name, "aria-label": "split " + split.name });
  node.append(el("h3", {}, split.name, el("span", { class: "thin" }, "  generation " + split.generation)));
  if (!readout) { node.append(el("p", { class: "thin" }, "no readout")); return node; }
  const kind = outcomeKind(readout);
  const rows = readout.arms.map((a) => {
    const s = (a[kind] && a[kind].summary) || {};
    const centre = kind === "yes_no" ? s.proportion : s.mean;
    const iv = kind === "yes_no" ? s.wilson_interval : s.mean_interval;
    return el("tr", { "data-arm": a.arm },
      el("th", { scope: "row" }, a.arm),
      el("td", {}, a.adapter + (a.version ? "@" + shortVersion(a.version) : "")),
      el("td", { class: "num", "data-col": "weight" }, num(a.weight, 2)),
      el("td", { class: "num", "data-col": "requests" }, a.requests),
      el("td", { class: "num", "data-col": "outcomes" }, s.count || 0),
      el("td", { class: "num", "data-col": "centre" }, num(centre)),
      el("td", { class: "num", "data-col": "interval" }, iv ? `${num(iv.low)} to ${num(iv.high)}` : "-"));
  });
  node.append(el("div", { class: "scroll" }, el("table", {},
    el("thead", {}, el("tr", {}, ...["Arm", "Serves", "Weight", "Requests", "Outcomes",
      kind === "yes_no" ? "Share yes" : "Mean", "95% interval"].map((h, i) =>
      el("th", { scope: "col", class: i >= 2 ? "num" : null }, h)))),
    el("tbody", {}, ...rows))));
  const check = readout.assignment_check;
  if (check && check.mismatch) {
    node.append(el("p", { class: "alarm", role: "status" },
      "Traffic does not reach the arms as weighted (p = " + num(check.p_value) + "): fix that before reading the comparison."));
  }
  node.append(el("div", { class: "chart difference", "data-kind": kind }, differenceChart(readout, kind)),
    el("p", { class: "legend" }, "Each later arm against ", readout.arms[0] ? readout.arms[0].arm : "-",
      ": the bar is the 95% interval of the difference (always valid once each arm has 10 outcomes, ",
      "fixed sample before), the mark its estimate; a square mark means the interval leaves out 0."));
  return node;
}

// Each later arm's difference to the first arm, with its interval, on one shared axis.
function differenceChart(readout, kind) {
  const first = readout.arms[0];
  const later = readout.arms.slice(1).map((a) => ({ arm: a.arm, c: comparison(a[kind]) }));
  const known = later.filter((x) => x.c);
  const w = 320, rowH = 26, top = 18, h = top + Math.max(1, later.length) * rowH + 8;
  const label = `difference in ${kind === "yes_no" ? "share yes" : "mean"} to arm ${first ? first.arm : "-"}`;
  const chart = svg("svg", { viewBox: `0 0 ${w} ${h}`, role: "img", "aria-label": label });
  chart.append(svg("title", {}, label));
  if (!known.length) {
    chart.append(svg("text", { x: 4, y: top + 12, "font-size": 11, fill: "#5b6169" },
      later.length ? "no interval yet: each arm needs outcomes" : "one arm: nothing to compare"));
    chart.dataset.intervals = "0";
    return chart;
  }
  const extent = Math.max(...known.flatMap((x) => [Math.abs(x.c.interval.low), Math.abs(x.c.interval.high)]), 1e-9) * 1.1;
  const left = 90, right = w - 10;
  const xOf = (v) => left + ((v + extent) / (2 * extent)) * (right - left);
  chart.append(
    svg("line", { x1: xOf(0), y1: top - 4, x2: xOf(0), y2: h - 4, stroke: "#5b6169", "stroke-dasharray": "3 3" }),
    svg("text", { x: xOf(0), y: 10, "font-size": 10, "text-anchor": "middle", fill: "#5b6169" }, "0"),
    svg("text", { x: left, y: 10, "font-size": 10, fill: "#5b6169" }, num(-extent, 2)),
    svg("text", { x: right, y: 10, "font-size": 10, "text-anchor": "end", fill: "#5b6169" }, num(extent, 2)));
  later.forEach((x, i) => {
    const y = top + i * rowH + rowH / 2;
    chart.append(svg("text", { x: 0, y: y + 4, "font-size": 11, fill: "#1f2328" }, x.arm));
    if (!x.c) return;
    const { low, high } = x.c.interval;
    const clear = low > 0 || high < 0;
    const colour = clear ? "#d55e00" : "#0072b2";
    const g = svg("g", { "data-arm": x.arm, "data-difference": x.c.difference, "data-low": low, "data-high": high });
    g.append(
      svg("title", {}, `${x.arm}: ${num(x.c.difference)} (${num(low)} to ${num(high)}, ${x.c.label}, p = ${num(x.c.p_value)})`),
      svg("line", { x1: xOf(low), y1: y, x2: xOf(high), y2: y, stroke: colour, "stroke-width": 3 }),
      svg("line", { x1: xOf(low), y1: y - 5, x2: xOf(low), y2: y + 5, stroke: colour, "stroke-width": 2 }),
      svg("line", { x1: xOf(high), y1: y - 5, x2: xOf(high), y2: y + 5, stroke: colour, "stroke-width": 2 }),
      clear ? svg("rect", { x: xOf(x.c.difference) - 4, y: y - 4, width: 8, height: 8, fill: colour })
        : svg("circle", { cx: xOf(x.c.difference), cy: y, r: 4, fill: colour }));
    chart.append(g);
  });
  chart.dataset.intervals = String(known.length);
  return chart;
}

// ---- wiring -----------------------------------------------------------------------------------

document.addEventListener("DOMContentLoaded", () => {
  $("sign-in-form").addEventListener("submit", (e) => {
    e.preventDefault();
    const token = $("token").value.trim();
    if (!token) return;
    sessionStorage.setItem(TOKEN_KEY, token);
    $("token").value = "";
    showBoard();
  });
  $("sign-out").addEventListener("click", () => {
    sessionStorage.removeItem(TOKEN_KEY);
    showSignIn("");
  });
  $("adapter-filter").addEventListener("input", (e) => {
    view.filter = e.target.value;
    if (view.last) renderAdapters(...view.last);
  });
  for (const th of document.querySelectorAll("#adapters thead th")) {
    th.querySelector("button").addEventListener("click", () => {
      const key = th.dataset.key;
      view.sortDir = view.sortKey === key ? -view.sortDir : 1;
      view.sortKey = key;
      for (const other of document.querySelectorAll("#adapters thead th")) other.removeAttribute("aria-sort");
      th.setAttribute("aria-sort", view.sortDir > 0 ? "ascending" : "descending");
      if (view.last) renderAdapters(...view.last);
    });
  }
  if (sessionStorage.getItem(TOKEN_KEY)) showBoard();
  else showSignIn("");
});
