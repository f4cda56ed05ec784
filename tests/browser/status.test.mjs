// The status page in headless Chromium, against a real switchyard server that the Rust test
// `status_page` starts (it passes the address, the admin token and the fixtures folder in the
// environment). Every request the browser makes is checked: any whose host is not 127.0.0.1
// is aborted and fails the run.
import { test, before, after } from "node:test";
import assert from "node:assert/strict";
import { readFile, mkdtemp, rm } from "node:fs/promises";
import { tmpdir } from "node:os";
import path from "node:path";
import { fileURLToPath } from "node:url";
import { chromium } from "playwright-core";

const base = process.env.SWITCHYARD_STATUS_URL;
const token = process.env.SWITCHYARD_ADMIN_TOKEN;
const tenantKey = process.env.SWITCHYARD_TENANT_KEY;
const fixtures = process.env.SWITCHYARD_FIXTURES;
// A relative folder is taken from the workspace root, as the README's command gives it.
const screenshots = process.env.SWITCHYARD_STATUS_SCREENSHOTS &&
  path.resolve(fileURLToPath(new URL("../..", import.meta.url)), process.env.SWITCHYARD_STATUS_SCREENSHOTS);
assert.ok(base && token && tenantKey && fixtures, "run through `cargo test -p switchyard-tests --test status_page`");
assert.equal(new URL(base).hostname, "127.0.0.1");

// The bound: a publish, flip or rollback shows on the page within 2 s.
const LIVE_WITHIN_MS = 2000;

let browser, context, page, profile;
const elsewhere = [];
const seen = [];

async function admin(method, route, body, contentType) {
  const resp = await fetch(base + route, {
    method,
    headers: { Authorization: `Bearer ${token}`, ...(contentType ? { "Content-Type": contentType } : {}) },
    body,
  });
  const text = await resp.text();
  assert.ok(resp.ok, `${method} ${route} answered ${resp.status}: ${text}`);
  return JSON.parse(text);
}

async function embed(target) {
  const resp = await fetch(base + "/embed", {
    method: "POST",
    headers: { "Content-Type": "application/json", Authorization: `Bearer ${tenantKey}` },
    body: JSON.stringify({ ...target, texts: ["the gate opens at nine"] }),
  });
  const text = await resp.text();
  assert.equal(resp.status, 200, text);
  return JSON.parse(text);
}

const row = (name) => page.locator(`#adapters tbody tr[data-adapter="${name}"]`);

before(async () => {
  profile = await mkdtemp(path.join(tmpdir(), "switchyard-chromium-"));
  browser = await chromium.launch({
    executablePath: process.env.SWITCHYARD_CHROMIUM || "/usr/bin/chromium",
    headless: true,
    args: ["--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
      "--disable-background-networking", "--disable-component-update", "--disable-sync",
      `--disk-cache-dir=${profile}/cache`],
  });
  context = await browser.newContext({ viewport: { width: 1280, height: 900 } });
  await context.route("**/*", (route) => {
    const url = new URL(route.request().url());
    if (url.protocol === "data:" || url.hostname === "127.0.0.1") return route.continue();
    elsewhere.push(url.href);
    return route.abort("blockedbyclient");
  });
  context.on("request", (r) => seen.push({ url: r.url(), at: Date.now() }));
  page = await context.newPage();
});

after(async () => {
  await browser?.close();
  if (profile) await rm(profile, { recursive: true, force: true });
});

test("a wrong token is refused and shows no data", async () => {
  await page.goto(base + "/status");
  await page.fill("#token", "not-the-admin-token");
  await page.press("#token", "Enter");
  await page.locator("#sign-in-error").waitFor({ state: "visible", timeout: 5000 });
  assert.match(await page.textContent("#sign-in-error"), /refused/);
  assert.equal(await page.isVisible("#board"), false);
  assert.equal(await page.evaluate(() => sessionStorage.length), 0, "a refused token is not kept");
  // The data endpoints themselves refuse it too.
  const resp = await fetch(base + "/admin/adapters", { headers: { Authorization: "Bearer not-the-admin-token" } });
  assert.ok([401, 403].includes(resp.status), `answered ${resp.status}`);
});

test("signing in shows the base model and every adapter with its tier", async () => {
  await page.fill("#token", token);
  await page.click("#sign-in-form button[type=submit]");
  await page.locator("#board").waitFor({ state: "visible" });
  assert.equal(await page.evaluate(() => sessionStorage.getItem("switchyard-status-token")), token);
  const listing = await admin("GET", "/admin/adapters");
  await page.waitForFunction((w) => document.getElementById("base-weights").textContent === w,
    listing.base.weights, { timeout: 5000 });
  assert.equal(await page.textContent("#base-kernels"), listing.base.kernels);
  assert.equal(await page.textContent("#base-library"), listing.base.library || "none: our own kernels only");
  // The Rust test published north-routing (and sent it one request) and south-routing.
  await row("north-routing").locator("[data-col=tier]", { hasText: "factors" }).waitFor({ timeout: 5000 });
  assert.equal((await row("south-routing").locator("[data-col=tier]").textContent()).trim(), "disk");
  const north = listing.adapters.find((a) => a.name === "north-routing");
  assert.equal(await row("north-routing").locator("[data-col=live]").getAttribute("title"), north.live);
  assert.equal(await row("north-routing").locator("[data-col=requests]").textContent(), "1");
  // Last use comes from the server, so a request before the page opened shows.
  assert.match(await row("north-routing").locator("[data-col=last-used]").textContent(), /^\d+ s ago$/);
  assert.equal(await row("south-routing").locator("[data-col=last-used]").textContent(), "never");
  // The last hour's charts start from the server's samples (the Rust test waited for at least
  // five before starting this script), not from the page's first poll.
  const readings = Number(/last (\d+) readings/.exec(await page.textContent("#queue-chart title"))[1]);
  assert.ok(readings >= 5, `the queue chart has ${readings} readings right after sign-in`);
  const memoryReadings = await page.textContent("#memory [data-tier=factors] svg.spark title");
  assert.ok(Number(/last (\d+) readings/.exec(memoryReadings)[1]) >= 5, memoryReadings);
  // The tenants whose patterns reach each adapter, in the configuration's order.
  assert.equal(await row("north-routing").locator("[data-col=tenants]").textContent(),
    "ridge-north (north-*); ridge-all (*-routing)");
  assert.equal(await row("south-routing").locator("[data-col=tenants]").textContent(), "ridge-all (*-routing)");
  // Swap stages, counted as /metrics counts them: north-routing's first request read it.
  const metrics = await (await fetch(base + "/metrics", { headers: { Authorization: `Bearer ${token}` } })).text();
  const reads = Number(/^switchyard_swap_seconds_count\{stage="read"\} (\S+)$/m.exec(metrics)[1]);
  assert.ok(reads >= 1, metrics);
  await page.locator(`#swaps tr[data-stage=read] [data-col=count]`, { hasText: String(reads) }).waitFor({ timeout: 3000 });
  assert.equal(await page.locator("#swaps tr[data-stage=read] svg rect").count(), 18, "one bar per finite bucket (18, from 0.1 ms doubling)");
  // Cold against warm answers, counted as /metrics counts them: north-routing's one request
  // loaded it (cold); none found an adapter resident yet.
  const cold = Number(/^switchyard_adapter_answer_seconds_count\{start="cold"\} (\S+)$/m.exec(metrics)[1]);
  assert.equal(cold, 1);
  assert.equal(await page.textContent("#timings tr[data-measure=cold] [data-col=count]"), "1");
  assert.equal(await page.textContent("#timings tr[data-measure=warm] [data-col=count]"), "0");
  assert.equal(await page.locator("#timings tr[data-measure=cold] svg rect").count(), 18);
  assert.equal(await page.locator("#timings tr[data-measure=batch-rows] svg rect").count(), 12,
    "rows per pass: one bar per finite bucket (12, from 1 doubling)");
  // Memory against its budget, from the same listing.
  const factors = await page.locator("#memory [data-tier=factors]").textContent();
  assert.match(factors, /of /);
  // A request refused before it ran counts as an error of the adapter it named, per minute too.
  const refused = await fetch(base + "/embed", {
    method: "POST",
    headers: { "Content-Type": "application/json", Authorization: `Bearer ${tenantKey}` },
    body: JSON.stringify({ adapter: "north-routing", texts: [] }),
  });
  assert.equal(refused.status, 400, await refused.text());
  await row("north-routing").locator("[data-col=errors]", { hasText: "1" }).waitFor({ timeout: 3000 });
  await page.waitForFunction(() => Number(document.querySelector(
    '#adapters tbody tr[data-adapter="north-routing"] [data-col=error-rate]').textContent) > 0, null, { timeout: 3000 });
  assert.equal(await row("south-routing").locator("[data-col=error-rate]").textContent(), "0.0");
});

test("a publish, a rollback and a flip show on the page within 2 s", async () => {
  const before = (await admin("GET", "/admin/adapters")).adapters.find((a) => a.name === "north-routing").live;
  const bytes = await readFile(path.join(fixtures, "minilm-qv-b.safetensors"));
  const published = await admin("PUT", "/admin/adapters/north-routing", bytes, "application/octet-stream");
  const t0 = Date.now();
  await row("north-routing").locator(`[data-col=live][title="${published.version}"]`)
    .waitFor({ timeout: LIVE_WITHIN_MS });
  const shownAfter = Date.now() - t0;
  assert.ok(shownAfter <= LIVE_WITHIN_MS, `publish shown after ${shownAfter} ms`);
  assert.match(await row("north-routing").locator("[data-col=others]").textContent(), new RegExp(before.slice(0, 12)));

  await admin("POST", "/admin/adapters/north-routing/rollback");
  const t1 = Date.now();
  await row("north-routing").locator(`[data-col=live][title="${before}"]`).waitFor({ timeout: LIVE_WITHIN_MS });
  assert.ok(Date.now() - t1 <= LIVE_WITHIN_MS, `rollback shown after ${Date.now() - t1} ms`);

  await admin("POST", "/admin/adapters/north-routing/live", JSON.stringify({ version: published.version }),
    "application/json");
  const t2 = Date.now();
  await row("north-routing").locator(`[data-col=live][title="${published.version}"]`)
    .waitFor({ timeout: LIVE_WITHIN_MS });
  assert.ok(Date.now() - t2 <= LIVE_WITHIN_MS, `flip shown after ${Date.now() - t2} ms`);
});

test("the adapters table filters and sorts, by keyboard too", async () => {
  await page.fill("#adapter-filter", "south");
  await page.waitForFunction(() => document.querySelectorAll("#adapters tbody tr[data-adapter]").length === 1);
  assert.equal(await page.locator("#adapters tbody tr[data-adapter]").getAttribute("data-adapter"), "south-routing");
  await page.fill("#adapter-filter", "");
  const names = () => page.$$eval("#adapters tbody tr[data-adapter]", (rs) => rs.map((r) => r.dataset.adapter));
  assert.deepEqual(await names(), ["north-routing", "south-routing"]);
  // Name is sorted ascending; focus its button and press Enter to turn the order round.
  await page.focus("#adapters thead th[data-key=name] button");
  await page.keyboard.press("Enter");
  await page.waitForFunction(() => document.querySelector("#adapters tbody tr").dataset.adapter === "south-routing");
  assert.equal(await page.getAttribute("#adapters thead th[data-key=name]", "aria-sort"), "descending");
  await page.keyboard.press("Enter");
  assert.deepEqual(await names(), ["north-routing", "south-routing"]);
});

test("a split's outcomes change its readout on the page", async () => {
  await admin("PUT", "/admin/splits/north-trial", JSON.stringify({ arms: [
    { name: "incumbent", adapter: "north-routing", weight: 0.5 },
    { name: "candidate", adapter: "south-routing", weight: 0.5 },
  ] }), "application/json");
  const split = page.locator('#splits article[data-split="north-trial"]');
  await split.waitFor({ timeout: LIVE_WITHIN_MS });
  await split.locator('svg[data-intervals="0"]').waitFor({ timeout: LIVE_WITHIN_MS });
  assert.equal(await split.locator('tr[data-arm="candidate"] [data-col=outcomes]').textContent(), "0");

  // Ten outcomes an arm (the always-valid figures need 10): about 1 for the incumbent, 3 for
  // the candidate, so the difference is about 2.
  const counts = { incumbent: 0, candidate: 0 };
  for (let i = 0; i < 200 && (counts.incumbent < 10 || counts.candidate < 10); i += 1) {
    const answer = await embed({ split: "north-trial", subject: `rider-${i}` });
    const arm = answer.split.arm;
    if (counts[arm] >= 10) continue;
    const value = (arm === "incumbent" ? 1 : 3) + ((counts[arm] % 3) - 1) * 0.25;
    counts[arm] += 1;
    const resp = await fetch(base + "/outcomes", {
      method: "POST",
      headers: { "Content-Type": "application/json", Authorization: `Bearer ${tenantKey}` },
      body: JSON.stringify({ response_id: answer.id, value }),
    });
    assert.equal(resp.status, 200, await resp.text());
  }
  assert.deepEqual(counts, { incumbent: 10, candidate: 10 });
  const t0 = Date.now();
  const readout = await admin("GET", "/admin/splits/north-trial/readout");
  const compared = readout.arms[1].numeric.versus_first_always_valid;
  // The page may still show a poll from before the last outcome (a fixed-sample interval while
  // an arm had fewer than 10): wait for the one that counts all 20.
  const interval = split.locator(
    `svg[data-intervals="1"] g[data-arm="candidate"][data-difference="${compared.difference}"]`);
  await interval.waitFor({ timeout: LIVE_WITHIN_MS });
  assert.ok(Date.now() - t0 <= LIVE_WITHIN_MS);
  assert.equal(await split.locator('tr[data-arm="candidate"] [data-col=outcomes]').textContent(), "10");
  // Split traffic reached south-routing while the page watched.
  assert.match(await row("south-routing").locator("[data-col=last-used]").textContent(), /^\d+ s ago$/);
  const difference = Number(await interval.getAttribute("data-difference"));
  assert.ok(Math.abs(difference - 2) < 0.2, `difference ${difference}`);
  assert.equal(difference, compared.difference);
  assert.equal(Number(await interval.getAttribute("data-low")), compared.interval.low);
  const mean = readout.arms[1].numeric.summary.mean_interval;
  assert.match(await split.locator('tr[data-arm="candidate"] [data-col=interval]').textContent(),
    new RegExp(`^${mean.low.toFixed(3)} to ${mean.high.toFixed(3)}$`));
});

test("the page polls at most once a second", async () => {
  const from = Date.now();
  await page.waitForTimeout(4000);
  const polls = seen.filter((r) => r.at >= from && r.url.endsWith("/admin/adapters")).length;
  assert.ok(polls >= 2 && polls <= 5, `${polls} polls of /admin/adapters in 4 s`);
});

test("on a phone-sized screen nothing runs off the side", async () => {
  if (screenshots) await page.screenshot({ path: path.join(screenshots, "status-desktop.png"), fullPage: true });
  await page.setViewportSize({ width: 390, height: 844 });
  await page.waitForTimeout(300);
  const overflow = await page.evaluate(() => document.documentElement.scrollWidth - window.innerWidth);
  assert.ok(overflow <= 0, `the page is ${overflow} px wider than the screen`);
  if (screenshots) await page.screenshot({ path: path.join(screenshots, "status-phone.png"), fullPage: true });
});

test("no request left 127.0.0.1", () => {
  assert.deepEqual(elsewhere, []);
  assert.ok(seen.length > 10);
  for (const r of seen) assert.equal(new URL(r.url).hostname, "127.0.0.1", r.url);
});
