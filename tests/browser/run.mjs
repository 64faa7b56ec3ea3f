// Real-browser checks of gapwise's pages in Debian's headless Chromium.
// Usage: node run.mjs BASE_URL ARTEFACT_DIR KEY   (exit code 0 when every check passes)
import { chromium } from 'playwright-core';
import fs from 'node:fs';
import path from 'node:path';

const [base, out, key] = process.argv.slice(2);
fs.mkdirSync(out, { recursive: true });
const failures = [];
const check = (ok, what) => { if (!ok) failures.push(what); };

const browser = await chromium.launch({
  executablePath: process.env.CHROMIUM || '/usr/bin/chromium',
  args: ['--headless', '--no-sandbox', '--disable-gpu', '--disable-background-networking', '--disable-component-update', '--no-first-run'],
});
const context = await browser.newContext({ viewport: { width: 1366, height: 768 }, acceptDownloads: true });
const page = await context.newPage();
const consoleErrors = [];
page.on('console', (m) => { if (m.type() === 'error') consoleErrors.push(m.text()); });
page.on('requestfailed', (r) => consoleErrors.push(`request failed: ${r.url()}`));

// Without the key nothing is shown; the start-up URL hands it over and leaves the address bar.
const refused = await page.goto(base + '/');
check(refused && refused.status() === 401, `/ without the key answered ${refused && refused.status()}`);
const welcomed = await page.goto(base + '/?key=' + key);
check(welcomed && welcomed.status() === 200, `the start-up URL answered ${welcomed && welcomed.status()}`);
check(!page.url().includes('key='), `the key stays in the address bar: ${page.url()}`);
const cookies = await context.cookies();
check(cookies.length === 1 && cookies[0].httpOnly && cookies[0].sameSite === 'Strict', `the key cookie: ${JSON.stringify(cookies)}`);
// The 401 above is a console error of its own; the pages below must add none.
consoleErrors.length = 0;

const pages = ['/', '/coverage', '/model', '/balance', '/plan?replicates=20', '/impact?bootstrap=49', '/sensitivity'];
for (const p of pages) {
  const response = await page.goto(base + p);
  check(response && response.status() === 200, `${p} answered ${response && response.status()}`);
  const svgs = await page.locator('figure svg').count();
  check(svgs > 0, `${p} shows no chart`);
  check(await page.locator('table').count() > 0, `${p} shows no table`);
  check(!(await page.content()).includes('NaN'), `${p} shows NaN`);
  const name = p === '/' ? 'overview' : p.slice(1).split('?')[0];
  await page.screenshot({ path: path.join(out, `page-${name}.png`), fullPage: true });
}

// Change a setting through the form: the URL carries it and the chart changes.
await page.goto(base + '/balance');
const before = await page.locator('figure svg').first().innerHTML();
await page.selectOption('select[name="weighting"]', 'raking');
await Promise.all([page.waitForURL(/weighting=raking/), page.click('form.settings button[type="submit"]')]);
const after = await page.locator('figure svg').first().innerHTML();
check(before !== after, 'changing the weighting did not change the balance chart');
check(page.url().includes('weighting=raking'), 'the URL does not carry the setting');
// Untick an indicator: the link reproduces the view.
await page.uncheck('input[name="covariate"][value="log_population"]');
await Promise.all([page.waitForNavigation(), page.click('form.settings button[type="submit"]')]);
check(!(await page.locator('#table').innerText()).includes('Population (log)'), 'unticked indicator still shown');
const link = page.url();
await page.goto(link);
check(!(await page.locator('#table').innerText()).includes('Population (log)'), 'the link does not reproduce the view');

// What-if on the planner: tick a candidate, the summary appears.
await page.goto(base + '/plan?replicates=10');
const firstCandidate = page.locator('#candidates input[name="joiner"]').first();
const candidateId = await firstCandidate.getAttribute('value');
await firstCandidate.check();
await Promise.all([page.waitForNavigation(), page.click('#candidates button[type="submit"]')]);
check((await page.locator('.whatif').innerText()).includes(candidateId), 'what-if summary missing');

// Downloads: a chart and a table.
for (const [where, selector, starts] of [['/coverage', 'a[href^="/coverage/map.svg"]', '<svg'], ['/balance', 'a[href^="/balance/table.csv"]', 'covariate,']]) {
  await page.goto(base + where);
  const [download] = await Promise.all([page.waitForEvent('download'), page.click(selector)]);
  const file = path.join(out, download.suggestedFilename());
  await download.saveAs(file);
  const text = fs.readFileSync(file, 'utf8');
  check(text.startsWith(starts), `${where} download ${download.suggestedFilename()} starts with ${JSON.stringify(text.slice(0, 20))}`);
  check(/-wave4\.(svg|csv)$/.test(download.suggestedFilename()), `${where} download is named ${download.suggestedFilename()}, without its wave`);
}

// The meeting report from the button.
// It carries the page's settings and says so; its name says the wave.
await page.goto(base + '/balance?wave=2&weighting=raking');
const [report] = await Promise.all([page.waitForEvent('download'), page.click('a.report-button')]);
check(report.suggestedFilename() === 'gapwise-report-wave2.html', `the report is saved as ${report.suggestedFilename()}`);
const reportFile = path.join(out, report.suggestedFilename());
await report.saveAs(reportFile);
const reportText = fs.readFileSync(reportFile, 'utf8');
check(reportText.includes('id="reproducibility"') && reportText.includes('Wave 2.'), 'the report download is incomplete');
check(reportText.includes('Raking to category shares') && reportText.includes('weighting=raking'), 'the report does not carry the page\'s weighting');
await page.goto('file://' + reportFile);
await page.screenshot({ path: path.join(out, 'report.png'), fullPage: false });

check(consoleErrors.length === 0, `browser errors: ${consoleErrors.join('; ')}`);
await browser.close();
if (failures.length) {
  console.error(failures.map((f) => `FAIL ${f}`).join('\n'));
  process.exit(1);
}
console.log(`browser checks passed; screenshots in ${out}`);
