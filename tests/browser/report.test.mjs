// Opens liftgate's report.html in headless Chromium and checks what a reader gets:
//
// - the page loads with no console error or warning and no page error;
// - it makes no request but for the file:// page itself (every request is recorded);
// - the verdict and every chart are in the rendered DOM and visible, at desktop and phone width;
// - at phone width nothing overflows the screen sideways;
// - with scripting disabled the verdict and charts are still there;
// - in a second report whose answers were made hostile (markup, script, event handlers,
//   javascript: links, bidirectional overrides), nothing ran: no window.__pwned, no dialog, no
//   script/img/iframe element, and the hostile text is shown as text;
// - full-page screenshots at 1280 and 390 px wide, and an A4 PDF, go to the output directory.
//
// Usage: node report.test.mjs --liftgate BIN --root DIR --demo REPORT_DIR --out SHOTS_DIR
// (run.sh makes the demo report and passes these).

import { chromium } from "playwright-core";
import { execFileSync } from "node:child_process";
import fs from "node:fs";
import os from "node:os";
import path from "node:path";
import { pathToFileURL } from "node:url";

const args = Object.fromEntries(
  process.argv.slice(2).reduce((pairs, a, i, all) => {
    if (a.startsWith("--")) pairs.push([a.slice(2), all[i + 1]]);
    return pairs;
  }, []),
);
for (const key of ["liftgate", "root", "demo", "out"]) {
  if (!args[key]) {
    console.error(`missing --${key}`);
    process.exit(2);
  }
}
const CHROMIUM = process.env.CHROMIUM || "/usr/bin/chromium";
const FLAGS = [
  "--no-sandbox",
  "--disable-gpu",
  "--disable-quic",
  "--no-first-run",
  "--disable-background-networking",
  "--disable-component-update",
  "--disable-sync",
];
const CHARTS = ["chart-lift", "chart-categories", "chart-refusals", "chart-changes"];
const HOSTILE_SCRIPT = "<img src=x onerror=alert(1)><script>window.__pwned=1</script>";
const HOSTILE_MORE =
  "\u202Edesrever\u2066 <a href=\"javascript:alert(2)\">pay here</a> <style>body{display:none}</style>" +
  "<link rel=stylesheet href=http://tracker.invalid/x.css> <svg onload=alert(3)></svg>";

const failures = [];
function check(ok, what) {
  console.log(`${ok ? "ok  " : "FAIL"} ${what}`);
  if (!ok) failures.push(what);
}

/** A copy of the demo's grades with hostile answers, weighed into a new report directory. */
function hostileReport(demoDir, work) {
  const summary = JSON.parse(fs.readFileSync(path.join(demoDir, "summary.json"), "utf8"));
  const worseId = summary.changes.worse[0]?.id;
  const betterId = summary.changes.better[0]?.id;
  if (!worseId || !betterId) throw new Error("the demo report lists no changed questions");
  const rewrite = (name, id, answer) => {
    const rows = fs
      .readFileSync(path.join(demoDir, name), "utf8")
      .split("\n")
      .filter((l) => l.trim() !== "")
      .map((l) => JSON.parse(l));
    const row = rows.find((r) => r.id === id);
    if (!row) throw new Error(`${name}: no row ${id}`);
    row.answer = answer;
    const out = path.join(work, name);
    fs.writeFileSync(out, rows.map((r) => JSON.stringify(r)).join("\n") + "\n");
    return out;
  };
  const base = rewrite("baseline.grades.jsonl", betterId, HOSTILE_MORE);
  const cand = rewrite("candidate.grades.jsonl", worseId, HOSTILE_SCRIPT);
  const dir = path.join(work, "hostile-report");
  const weighArgs = [
    "weigh",
    "--questions",
    summary.inputs.questions.path,
    "--baseline",
    base,
    "--candidate",
    cand,
    "--report",
    dir,
    "--resamples",
    "1000",
    "--no-history",
  ];
  if (summary.inputs.policy.path) weighArgs.push("--policy", summary.inputs.policy.path);
  try {
    execFileSync(args.liftgate, weighArgs, { cwd: args.root, stdio: ["ignore", "ignore", "inherit"] });
  } catch (e) {
    // 1 is NO-GO, a valid outcome.
    if (e.status !== 1) throw e;
  }
  return dir;
}

async function openPage(context, file) {
  const page = await context.newPage();
  const log = { console: [], errors: [], requests: [], dialogs: [] };
  page.on("console", (m) => {
    if (m.type() === "error" || m.type() === "warning") log.console.push(`${m.type()}: ${m.text()}`);
  });
  page.on("pageerror", (e) => log.errors.push(String(e)));
  page.on("dialog", async (d) => {
    log.dialogs.push(d.message());
    await d.dismiss();
  });
  context.on("request", (r) => log.requests.push(r.url()));
  const url = pathToFileURL(file).href;
  await page.goto(url, { waitUntil: "load" });
  // Give anything deferred (lazy images, late scripts) a moment to show itself.
  await page.waitForTimeout(300);
  return { page, log, url };
}

async function checkPage(label, page, log, url, width) {
  check(log.errors.length === 0, `${label}: no page errors ${JSON.stringify(log.errors)}`);
  check(log.console.length === 0, `${label}: no console errors or warnings ${JSON.stringify(log.console)}`);
  const others = log.requests.filter((u) => u !== url);
  check(others.length === 0, `${label}: no request but the page itself ${JSON.stringify(others)}`);
  const verdict = await page.locator("#verdict").getAttribute("data-verdict");
  check(verdict === "GO" || verdict === "NO-GO", `${label}: verdict in the DOM (${verdict})`);
  const h1 = await page.locator("#verdict h1").innerText();
  check(h1.startsWith(`${verdict}:`), `${label}: the verdict heading says ${verdict} in words`);
  check(await page.locator("#verdict").isVisible(), `${label}: verdict visible`);
  const layout = width < 640 ? "narrow" : "wide";
  for (const id of CHARTS) {
    const fig = page.locator(`figure[data-chart="${id}"]`);
    check((await fig.count()) === 1, `${label}: chart ${id} present`);
    const svg = fig.locator(`.chart.${layout} svg`);
    const box = await svg.boundingBox();
    check(box !== null && box.width > 200 && box.height > 60, `${label}: chart ${id} drawn (${layout}, ${JSON.stringify(box)})`);
    const title = await svg.locator("title").first().textContent();
    check(Boolean(title && title.trim()), `${label}: chart ${id} has a title`);
    const caption = await fig.locator("figcaption").innerText();
    check(caption.length > 20, `${label}: chart ${id} has a caption`);
  }
  for (const id of ["checks", "worse", "better", "cautions", "inputs"]) {
    check((await page.locator(`section#${id}`).count()) === 1, `${label}: section ${id} present`);
  }
  const scrollWidth = await page.evaluate(() => document.documentElement.scrollWidth);
  check(scrollWidth <= width, `${label}: no sideways scrolling (${scrollWidth} px in ${width})`);
}

async function run() {
  fs.mkdirSync(args.out, { recursive: true });
  const work = fs.mkdtempSync(path.join(os.tmpdir(), "liftgate-browser-"));
  const demoHtml = path.join(args.demo, "report.html");
  check(fs.existsSync(demoHtml), `demo report.html exists (${demoHtml})`);
  const hostileDir = hostileReport(args.demo, work);
  const hostileHtml = path.join(hostileDir, "report.html");
  check(fs.existsSync(hostileHtml), "hostile report.html written");

  for (const [width, height, name] of [
    [1280, 900, "desktop"],
    [390, 844, "phone"],
  ]) {
    const profile = fs.mkdtempSync(path.join(work, `profile-${name}-`));
    const context = await chromium.launchPersistentContext(profile, {
      executablePath: CHROMIUM,
      headless: true,
      args: FLAGS,
      viewport: { width, height },
      deviceScaleFactor: 1,
    });
    try {
      for (const [label, file] of [
        ["demo", demoHtml],
        ["hostile", hostileHtml],
      ]) {
        const { page, log, url } = await openPage(context, file);
        await checkPage(`${label} ${name}`, page, log, url, width);
        if (label === "hostile") {
          const pwned = await page.evaluate(() => typeof window.__pwned);
          check(pwned === "undefined", `hostile ${name}: injected script did not run (window.__pwned ${pwned})`);
          check(log.dialogs.length === 0, `hostile ${name}: no dialog opened ${JSON.stringify(log.dialogs)}`);
          const live = await page.evaluate(
            () => document.querySelectorAll("script, img, iframe, object, embed, a[href], link[rel=stylesheet], foreignObject").length,
          );
          check(live === 0, `hostile ${name}: no script, image, frame, link or foreign object in the DOM (${live})`);
          const styles = await page.evaluate(() => document.querySelectorAll("style").length);
          check(styles === 1, `hostile ${name}: only the page's own stylesheet (${styles})`);
          const text = await page.evaluate(() => document.body.textContent);
          check(text.includes(HOSTILE_SCRIPT_TEXT), `hostile ${name}: the hostile answer is shown as text`);
          check(!/[\u202A-\u202E\u2066-\u2069]/.test(text), `hostile ${name}: no bidirectional controls in the text`);
          const bodyShown = await page.locator("body").isVisible();
          check(bodyShown, `hostile ${name}: injected style did not hide the page`);
        }
        await page.screenshot({ path: path.join(args.out, `${label}-${name}.png`), fullPage: true });
        if (label === "demo" && name === "desktop") {
          const pdf = path.join(args.out, "demo-a4.pdf");
          await page.pdf({ path: pdf, format: "A4", printBackground: true });
          const pages = (fs.readFileSync(pdf, "latin1").match(/\/Type\s*\/Page[^s]/g) || []).length;
          check(pages >= 2, `demo: prints on A4 (${pages} pages)`);
        }
        await page.close();
      }
    } finally {
      await context.close();
    }
  }

  // Scripting disabled: the page needs none.
  const profile = fs.mkdtempSync(path.join(work, "profile-nojs-"));
  const context = await chromium.launchPersistentContext(profile, {
    executablePath: CHROMIUM,
    headless: true,
    args: FLAGS,
    viewport: { width: 1280, height: 900 },
    javaScriptEnabled: false,
  });
  try {
    const { page, log, url } = await openPage(context, demoHtml);
    await checkPage("demo no-script", page, log, url, 1280);
    // Long answers open without script.
    const fold = page.locator("details.fold summary").first();
    if ((await fold.count()) > 0) {
      await fold.click();
      check(await page.locator("details.fold[open]").first().isVisible(), "demo no-script: a folded answer opens");
    }
  } finally {
    await context.close();
  }
  await checkTrend(args.demo, hostileDir, work);
  fs.rmSync(work, { recursive: true, force: true });

  console.log(`screenshots: ${args.out}`);
  if (failures.length > 0) {
    console.error(`${failures.length} check(s) failed`);
    process.exit(1);
  }
  console.log("browser test passed");
}

const HOSTILE_SCRIPT_TEXT = HOSTILE_SCRIPT;

/**
 * trend.html: the demo report and the hostile one recorded in a fresh history (the second under
 * a hostile label), `liftgate trend --out`, then the page at desktop and phone width.
 */
async function checkTrend(demoDir, hostileDir, work) {
  const history = path.join(work, "trend-history.sqlite");
  const out = path.join(work, "trend");
  const lf = (extra) =>
    execFileSync(args.liftgate, extra, { cwd: args.root, stdio: ["ignore", "ignore", "inherit"] });
  lf(["record", demoDir, "--history", history, "--label", "demo"]);
  lf(["record", hostileDir, "--history", history, "--label", HOSTILE_SCRIPT]);
  lf(["trend", "--history", history, "--out", out, "--resamples", "1000"]);
  const file = path.join(out, "trend.html");
  check(fs.existsSync(file), "trend.html written");
  for (const [width, height, name] of [
    [1280, 900, "desktop"],
    [390, 844, "phone"],
  ]) {
    const profile = fs.mkdtempSync(path.join(work, `profile-trend-${name}-`));
    const context = await chromium.launchPersistentContext(profile, {
      executablePath: CHROMIUM,
      headless: true,
      args: FLAGS,
      viewport: { width, height },
    });
    try {
      const { page, log, url } = await openPage(context, file);
      const label = `trend ${name}`;
      check(log.errors.length === 0, `${label}: no page errors ${JSON.stringify(log.errors)}`);
      check(log.console.length === 0, `${label}: no console errors or warnings ${JSON.stringify(log.console)}`);
      const others = log.requests.filter((u) => u !== url);
      check(others.length === 0, `${label}: no request but the page itself ${JSON.stringify(others)}`);
      check((await page.locator("section.series").count()) === 1, `${label}: one question set`);
      const layout = width < 640 ? "narrow" : "wide";
      const charts = page.locator(`figure[data-chart^="chart-trend-"]`);
      check((await charts.count()) === 3, `${label}: a chart per metric (${await charts.count()})`);
      const box = await charts.first().locator(`.chart.${layout} svg`).boundingBox();
      check(box !== null && box.width > 200 && box.height > 60, `${label}: trend chart drawn (${JSON.stringify(box)})`);
      check((await page.locator("table.runs tbody tr").count()) === 2, `${label}: both runs in the table`);
      check((await page.locator("table.like").count()) === 1, `${label}: the like-for-like table`);
      const pwned = await page.evaluate(() => typeof window.__pwned);
      check(pwned === "undefined", `${label}: the hostile label did not run (window.__pwned ${pwned})`);
      check(log.dialogs.length === 0, `${label}: no dialog opened`);
      const live = await page.locator("script, img, iframe, object, embed").count();
      check(live === 0, `${label}: no script or image element in the DOM (${live})`);
      const text = await page.locator("body").innerText();
      check(text.includes(HOSTILE_SCRIPT_TEXT), `${label}: the hostile label is shown as text`);
      const scrollWidth = await page.evaluate(() => document.documentElement.scrollWidth);
      check(scrollWidth <= width, `${label}: no sideways scrolling (${scrollWidth} px in ${width})`);
      fs.mkdirSync(args.out, { recursive: true });
      await page.screenshot({ path: path.join(args.out, `trend-${name}.png`), fullPage: true });
      await page.close();
    } finally {
      await context.close();
    }
  }
}

run().catch((e) => {
  console.error(e);
  process.exit(1);
});
