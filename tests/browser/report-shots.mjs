// Screenshots of the calibration and drift reports for docs/ (`make screenshots`):
// each report's opening screen, and the calibration's example pairs with their thumbnails.
// Usage: node report-shots.mjs CALIBRATION.html DRIFT.html OUT_DIR

import { mkdtempSync, rmSync } from "node:fs";
import { tmpdir } from "node:os";
import { join, resolve } from "node:path";
import { pathToFileURL } from "node:url";
import { chromium } from "playwright-core";

const [calibration, drift, out] = process.argv.slice(2).map((p) => resolve(p));
if (!out) {
  console.error("usage: node report-shots.mjs CALIBRATION.html DRIFT.html OUT_DIR");
  process.exit(2);
}
const profile = mkdtempSync(join(tmpdir(), "befit-shots-"));
const context = await chromium.launchPersistentContext(profile, {
  executablePath: process.env.CHROMIUM || "/usr/bin/chromium",
  headless: true,
  args: ["--headless", "--no-sandbox", "--disable-gpu", "--no-first-run", "--disable-background-networking"],
  viewport: { width: 1280, height: 1400 },
});
try {
  const page = context.pages()[0] || await context.newPage();
  for (const [file, name] of [[calibration, "calibration-report.png"], [drift, "drift-report.png"]]) {
    await page.goto(pathToFileURL(file).href);
    await page.screenshot({ path: join(out, name) });
  }
  await page.goto(pathToFileURL(calibration).href);
  // The section's top in page coordinates, which a full-page clip takes.
  const top = await page.evaluate(() => {
    const h2 = [...document.querySelectorAll("h2")].find((h) => h.textContent === "Pairs to look at");
    return h2.getBoundingClientRect().top + window.scrollY;
  });
  await page.screenshot({ path: join(out, "calibration-examples.png"), fullPage: true,
    clip: { x: 0, y: top - 10, width: 1280, height: 900 } });
} finally {
  await context.close();
  rmSync(profile, { recursive: true, force: true });
}
