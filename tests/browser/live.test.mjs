// The live page in a real browser: the real `befit serve` on a free loopback
// port with the bundled blocks-v1, headless Debian Chromium driven by
// playwright-core. Checks: no console errors, only befit's own files loaded,
// the models shown, non-zero throughput after a burst of reward requests,
// the burst's training run with its steps and the samples counted per step,
// every control reachable by Tab, no horizontal scroll at a phone's width.
// Screenshots (1280 and 390 px wide) go to target/browser/ for a person to look at.

import { test, before, after } from "node:test";
import assert from "node:assert/strict";
import { spawn } from "node:child_process";
import { mkdirSync, mkdtempSync, readFileSync, rmSync } from "node:fs";
import { tmpdir } from "node:os";
import { dirname, join, resolve } from "node:path";
import { createInterface } from "node:readline";
import { fileURLToPath } from "node:url";
import { chromium } from "playwright-core";

const repo = resolve(dirname(fileURLToPath(import.meta.url)), "../..");
const BIN = resolve(process.env.BEFIT_BIN || join(repo, "target/release/befit"));
const CHROMIUM = process.env.CHROMIUM || "/usr/bin/chromium";
const OUT = join(repo, "target/browser");
// Without these, Chromium reaches for Google's hosts at start, which this
// machine's closed network refuses (and may report as errors).
const CHROMIUM_FLAGS = [
  "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
  "--disable-background-networking", "--disable-component-update", "--disable-sync",
];
// Bounds on waiting, not measurements: the test fails if they run out.
const START_LIMIT_MS = 60_000;
const SHOW_LIMIT_MS = 20_000;

let server;
let url;
let context;
let page;
const scratch = [];
const consoleErrors = [];
const foreignRequests = [];
// The bank keeps each distinct caption once.
let distinctBankCaptions = 0;

function scratchDir(what) {
  const dir = mkdtempSync(join(tmpdir(), `befit-browser-${what}-`));
  scratch.push(dir);
  return dir;
}

async function startServer() {
  const child = spawn(BIN, [
    "serve", "--bundle", "fixtures/models/blocks-v1", "--listen", "127.0.0.1:0",
    "--data-dir", scratchDir("data"), "--image-root", "fixtures/probe",
  ], { cwd: repo, stdio: ["ignore", "ignore", "pipe"] });
  const address = await new Promise((ok, fail) => {
    const timer = setTimeout(() => fail(new Error("befit did not print its address")), START_LIMIT_MS);
    child.on("error", (e) => { clearTimeout(timer); fail(e); });
    child.on("exit", (code) => { clearTimeout(timer); fail(new Error(`befit exited with ${code} before listening`)); });
    // The binary prints this line for callers that ask for port 0.
    createInterface({ input: child.stderr }).on("line", (line) => {
      const m = line.match(/^befit: listening on (http:\/\/\S+)/);
      if (m) { clearTimeout(timer); ok(m[1]); }
    });
  });
  const deadline = Date.now() + START_LIMIT_MS;
  for (;;) {
    const ready = await fetch(`${address}/readyz`).then((r) => r.status === 200, () => false);
    if (ready) break;
    if (Date.now() > deadline) throw new Error("befit did not become ready");
    await new Promise((r) => setTimeout(r, 100));
  }
  return { child, address };
}

// Reward requests from the bundled probe set (40 requests of 4 groups each, in waves of 5,
// each wave one step of the run RUN), then the first 20 rows' captions into the caption bank.
const RUN = "blocks-demo";
const WAVE = 5;
let sampledCaptions = 0;
async function burst() {
  const rows = readFileSync(join(repo, "fixtures/probe/probe.jsonl"), "utf8")
    .split("\n").filter((l) => l.trim()).map((l) => JSON.parse(l));
  const bodies = Array.from({ length: 40 }, (_, i) => ({
    groups: [0, 1, 2, 3].map((g) => {
      // 40 distinct images, each asked for four times: the image cache has hits to show.
      const row = rows[(i * 4 + g) % 40];
      return { image: { path: row.image }, captions: row.captions };
    }),
    run: RUN,
    step: Math.floor(i / WAVE),
  }));
  sampledCaptions = bodies.reduce((n, b) => n + b.groups.reduce((m, g) => m + g.captions.length, 0), 0);
  // In waves with pauses between them, so the charts have several seconds to draw.
  const statuses = [];
  for (let w = 0; w < bodies.length; w += WAVE) {
    statuses.push(...await Promise.all(bodies.slice(w, w + WAVE).map((body) => post("/v1/rewards", body))));
    await new Promise((r) => setTimeout(r, 500));
  }
  // Some captions in the bank too, so its section has something to show.
  const captions = rows.slice(0, 20).flatMap((r) => r.captions);
  distinctBankCaptions = new Set(captions).size;
  statuses.push(await post("/v1/bank", { tag: "probe", captions }));
  return statuses;
}

async function post(route, body) {
  const r = await fetch(`${url}${route}`, {
    method: "POST",
    headers: { "content-type": "application/json" },
    body: JSON.stringify(body),
  });
  await r.arrayBuffer();
  return r.status;
}

async function settleCharts() {
  // Charts are drawn at the container's width; wait for the redraw after a resize.
  await page.waitForFunction(() => {
    const svg = document.querySelector("#plot-throughput svg");
    return svg && Math.abs(Number(svg.getAttribute("width")) - Math.max(240, svg.parentElement.clientWidth)) < 2;
  }, null, { timeout: SHOW_LIMIT_MS });
}

before(async () => {
  mkdirSync(OUT, { recursive: true });
  ({ child: server, address: url } = await startServer());
  context = await chromium.launchPersistentContext(scratchDir("profile"), {
    executablePath: CHROMIUM,
    headless: true,
    args: CHROMIUM_FLAGS,
    viewport: { width: 1280, height: 900 },
  });
  page = context.pages()[0] || await context.newPage();
  page.on("console", (m) => { if (m.type() === "error") consoleErrors.push(m.text()); });
  page.on("pageerror", (e) => consoleErrors.push(String(e)));
  page.on("request", (r) => { if (!r.url().startsWith(url)) foreignRequests.push(r.url()); });
});

after(async () => {
  if (context) await context.close();
  if (server) {
    const exited = new Promise((r) => server.once("exit", r));
    server.kill("SIGTERM");
    await exited;
  }
  for (const dir of scratch) rmSync(dir, { recursive: true, force: true });
});

test("the page loads and shows the loaded model", async () => {
  const response = await page.goto(`${url}/`);
  assert.equal(response.status(), 200);
  await page.waitForFunction(() => document.querySelector("#models tbody").textContent.includes("blocks@v1"),
    null, { timeout: SHOW_LIMIT_MS });
  const modelRow = await page.textContent("#models tbody");
  assert.match(modelRow, /blocks@v1/);
  assert.match(modelRow, /ready/);
  assert.match(await page.textContent("#status"), /^Ready · 1 model/);
  // No run has been named yet: the runs section says how to start one.
  await page.waitForFunction(() => document.getElementById("runs-summary").textContent.includes("No run"),
    null, { timeout: SHOW_LIMIT_MS });
  assert.match(await page.textContent("#runs-table tbody"), /no runs yet/);
});

test("a burst of reward requests shows as non-zero throughput", async () => {
  const statuses = await burst();
  assert.deepEqual([...new Set(statuses)], [200]);
  const rate = (id) => page.evaluate((i) => Number(document.getElementById(i).textContent.replace(/,/g, "")), id);
  await page.waitForFunction(() => ["captions-rate", "images-rate", "rewards-rate"]
    .every((id) => Number(document.getElementById(id).textContent.replace(/,/g, "")) > 0),
  null, { timeout: SHOW_LIMIT_MS });
  assert.ok(await rate("captions-rate") > 0);
  assert.ok(await rate("images-rate") > 0);
  assert.ok(await rate("rewards-rate") > 0);
  // The rewards route has a latency row with numbers, the encoders a row per tower.
  assert.match(await page.textContent("#routes tbody"), /\/v1\/rewards/);
  // Until a person picks a route, the latency chart follows the reward route.
  await page.waitForFunction(() => document.getElementById("route").value === "/v1/rewards",
    null, { timeout: SHOW_LIMIT_MS });
  const towers = await page.$$eval("#towers tbody tr", (rows) => rows.map((r) => r.cells[1].textContent));
  assert.deepEqual(towers.sort(), ["image", "text"]);
  await page.waitForFunction(() => document.getElementById("bank-tags").textContent.includes("probe"),
    null, { timeout: SHOW_LIMIT_MS });
  assert.ok(distinctBankCaptions > 0);
  assert.ok((await page.textContent("#bank-summary")).startsWith(`${distinctBankCaptions} captions, 1 tag,`));
});

test("the burst's training run shows with its steps and samples", async () => {
  await page.waitForFunction((run) => document.querySelector("#runs-table tbody").textContent.includes(run),
    RUN, { timeout: SHOW_LIMIT_MS });
  const cells = await page.$$eval("#runs-table tbody tr", (rows) => rows.map((r) => [...r.cells].map((c) => c.textContent)));
  assert.equal(cells.length, 1);
  const [name, latest, samples] = cells[0];
  assert.equal(name, RUN);
  // 40 requests in waves of WAVE, one step per wave: steps 0 to 7.
  assert.equal(Number(latest), 40 / WAVE - 1);
  // Every sampled caption of the burst, counted by the run watch, as the page prints it.
  assert.equal(Number(samples.replace(/,/g, "")), sampledCaptions);
  // One figure for the run, with the two charts drawn over its eight steps.
  const charts = await page.$$eval("#run-plots figure.run svg", (s) => s.map((e) => e.getAttribute("aria-label")));
  assert.equal(charts.length, 2);
  assert.match(charts[0], /reward and cosine per step/);
  const axis = await page.$$eval("#run-plots figure.run svg text", (t) => t.map((e) => e.textContent));
  assert.ok(axis.includes("step 0") && axis.includes(`step ${40 / WAVE - 1}`), `x axis: ${axis}`);
});

test("every control is reachable with the Tab key and works from the keyboard", async () => {
  await page.evaluate(() => document.activeElement && document.activeElement.blur());
  const reached = new Set();
  for (let i = 0; i < 40; i++) {
    await page.keyboard.press("Tab");
    reached.add(await page.evaluate(() => document.activeElement.id || document.activeElement.tagName));
  }
  for (const id of ["span", "pause", "route"]) assert.ok(reached.has(id), `Tab never reached #${id}: ${[...reached]}`);
  await page.focus("#pause");
  await page.keyboard.press("Enter");
  assert.equal(await page.getAttribute("#pause", "aria-pressed"), "true");
  await page.keyboard.press("Enter");
  assert.equal(await page.getAttribute("#pause", "aria-pressed"), "false");
});

test("readable at 1280 px and at a phone's 390 px, with screenshots", async () => {
  await page.setViewportSize({ width: 1280, height: 900 });
  await settleCharts();
  await page.screenshot({ path: join(OUT, "live-1280.png"), fullPage: true });
  await page.setViewportSize({ width: 390, height: 844 });
  await settleCharts();
  const overflow = await page.evaluate(() => document.documentElement.scrollWidth - window.innerWidth);
  assert.ok(overflow <= 0, `the page scrolls sideways by ${overflow} px at 390 px`);
  await page.screenshot({ path: join(OUT, "live-390.png"), fullPage: true });
});

test("no console errors and nothing fetched from elsewhere", () => {
  assert.deepEqual(consoleErrors, []);
  assert.deepEqual(foreignRequests, []);
});
