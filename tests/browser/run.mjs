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
page.on('response', (r) => { if (r.status() === 404) consoleErrors.push(`404: ${r.url()}`); });

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

const pages = ['/', '/coverage', '/model', '/balance', '/plan?replicates=20', '/impact?wild_replicates=49&replicates=49', '/sensitivity'];
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
// The settings are collapsed into a summary line; "change" opens them.
check(!(await page.locator('select[name="weighting"]').isVisible()), 'the settings are not collapsed');
check((await page.locator('details.settings-panel > summary').innerText()).includes('change'), 'no change control');
await page.click('details.settings-panel > summary');
await page.selectOption('select[name="weighting"]', 'raking');
await Promise.all([page.waitForURL(/weighting=raking/), page.click('form.settings button[type="submit"]')]);
const after = await page.locator('figure svg').first().innerHTML();
check(before !== after, 'changing the weighting did not change the balance chart');
check(page.url().includes('weighting=raking'), 'the URL does not carry the setting');
// Untick an indicator: the link reproduces the view.
await page.click('details.settings-panel > summary');
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

// Multiple imputation from the settings form: choose it on a page, the page says so,
// the overview shows what was filled with its charts, the plan and impact pages show the
// per-imputation tables, and the JSON twins carry one entry per imputation.
await page.goto(base + '/balance?wave=4');
await page.click('details.settings-panel > summary');
await page.selectOption('select[name="missing"]', 'impute');
await page.fill('input[name="imputations"]', '3');
await Promise.all([page.waitForURL(/missing=impute/), page.click('form.settings button[type="submit"]')]);
const imputedBalance = await page.content();
check(imputedBalance.includes('Multiple imputation'), 'the balance page under imputation does not say so');
check(!imputedBalance.includes('NaN'), 'the balance page under imputation shows NaN');
check(await page.locator('figure svg').count() > 0, 'the balance page under imputation shows no chart');
const imputedQuery = new URL(page.url()).search.slice(1);
check(imputedQuery.includes('imputations=3'), `the URL does not carry the imputations: ${imputedQuery}`);
await page.goto(base + '/?' + imputedQuery);
check(await page.locator('#imputation').count() === 1, 'the overview has no imputation section');
check(await page.locator('#imputation figure svg').count() >= 2, 'the overview shows no imputation charts');
check(await page.locator('#filled-cells').count() === 1, 'the overview does not list the filled values');
check((await page.locator('#imputation-caution').innerText()).includes('missing at random'), 'no caution beside the imputation');
await page.screenshot({ path: path.join(out, 'page-overview-imputed.png'), fullPage: true });
await page.goto(base + '/plan?' + imputedQuery + '&replicates=0');
check(await page.locator('#plan-imputations td').count() === 3, 'the plan page does not show the objective per imputation');
check((await page.locator('#plan-imputations').innerText()).includes("Rubin's rules"), 'the plan page does not say how the imputations combine');
await page.goto(base + '/impact?' + imputedQuery + '&replicates=0&wild_replicates=0');
check(await page.locator('#imputation-pooled thead th').count() === 5 + 3, 'the impact page has no column per imputation');
check(!(await page.content()).includes('NaN'), 'the impact page under imputation shows NaN');
await page.screenshot({ path: path.join(out, 'page-impact-imputed.png'), fullPage: true });
const planTwin = await (await page.request.get(base + '/api/plan?' + imputedQuery + '&replicates=0')).json();
check(planTwin.objective_by_imputation && planTwin.objective_by_imputation.length === 3, 'the plan twin does not carry the imputations');
const impactTwin = await (await page.request.get(base + '/api/impact?' + imputedQuery + '&replicates=0&wild_replicates=0')).json();
check(impactTwin.combination && impactTwin.combination.every((c) => c.imputations.length === 3), 'the impact twin does not carry the imputations');
const fitTwin = await (await page.request.get(base + '/api/imputation?' + imputedQuery)).json();
check(fitTwin.imputations === 3 && fitTwin.cells.length > 0, 'the imputation twin is incomplete');

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

// The presentation view: no forms, the same chart, links that keep the view.
await page.goto(base + '/balance?wave=2');
const normalChart = await page.locator('figure svg').first().innerHTML();
await page.click('a.view-toggle');
check(page.url().includes('view=present'), `the presentation link: ${page.url()}`);
check(await page.locator('form.settings').count() > 0 && !(await page.locator('form.settings').first().isVisible()), 'forms shown in the presentation view');
check((await page.locator('figure svg').first().innerHTML()) === normalChart, 'the presentation view shows another chart');
check((await page.locator('nav a[href^="/coverage"]').getAttribute('href')).includes('view=present'), 'navigation leaves the presentation view');
// Navigation on one line at 1024 px.
await page.setViewportSize({ width: 1024, height: 768 });
await page.goto(base + '/balance');
const navBox = await page.locator('header.topbar').boundingBox();
check(navBox && navBox.height < 60, `the navigation wraps at 1024 px (${navBox && navBox.height} px high)`);
await page.setViewportSize({ width: 1366, height: 768 });

// The error page's link back to the overview works (its 400, and the form's 422 below,
// are console errors of their own).
const expectedErrors = consoleErrors.length;
await page.goto(base + '/balance?wave=99');
await Promise.all([page.waitForNavigation(), page.click('main a[href="/"]')]);
check(page.url() === base + '/' && (await page.locator('h1').count()) > 0 && !(await page.content()).includes('Cannot show'), `the error page's overview link: ${page.url()}`);

// The project form keeps every entry after an error, and an earlier version comes back.
if (process.env.PROJECTS_FORM !== '0') try {
  const frame = 'iso,name,wave,took_part,gdp,democracy,region\nXAA,Aland,1,1,9.5,8.0,North\nXAB,Bland,1,0,8.1,6.5,South\nXAC,Cland,1,1,8.7,7.0,South\nXAD,Dland,1,0,7.0,3.0,North\nXAA,Aland,2,1,9.6,8.1,North\nXAB,Bland,2,1,8.2,6.6,South\nXAC,Cland,2,0,8.8,7.1,South\nXAD,Dland,2,0,7.1,3.2,North\n';
  const upload = async (content) => {
    await page.goto(base + '/projects');
    await page.fill('section#new input[name="name"]', 'browser-p');
    await page.fill('section#new input[name="title"]', 'Browser title');
    await page.setInputFiles('input[name="frame"]', { name: 'frame.csv', mimeType: 'text/csv', buffer: Buffer.from(content) });
    await Promise.all([page.waitForNavigation(), page.click('section#new button[type="submit"]')]);
    check(page.url().includes('/projects/map'), `the upload went to ${page.url()}: ${(await page.content()).slice(0, 400)}`);
  };
  await upload(frame);
  await page.check('input[name="numeric"][value="gdp"]');
  await page.fill('input[name="label.gdp"]', 'GDP per head');
  await page.selectOption('select[name="rule_indicator"] >> nth=0', 'democracy');
  await page.selectOption('select[name="rule_direction"] >> nth=0', 'at_most');
  await page.fill('input[name="rule_cut"] >> nth=0', 'oops');
  await Promise.all([page.waitForNavigation(), page.click('form.mapping button[type="submit"]')]);
  check((await page.locator('#problems').count()) === 1, 'no problems shown for a bad cut-off');
  check(await page.locator('input[name="numeric"][value="gdp"]').isChecked(), 'the ticked indicator was lost');
  check((await page.inputValue('input[name="label.gdp"]')) === 'GDP per head', 'the label was lost');
  check((await page.inputValue('input[name="rule_cut"] >> nth=0')) === 'oops', 'the cut-off was lost');
  check((await page.inputValue('select[name="rule_direction"] >> nth=0')) === 'at_most', 'the direction was lost');
  await page.fill('input[name="rule_cut"] >> nth=0', '9');
  await Promise.all([page.waitForNavigation(), page.click('form.mapping button[type="submit"]')]);
  check(new URL(page.url()).pathname === '/', `the fixed form did not save: ${page.url()}`);
  await upload(frame.replace('9.5', '9.9'));
  check(await page.locator('input[name="numeric"][value="gdp"]').isChecked(), 'a re-upload does not start from the previous mapping');
  await Promise.all([page.waitForNavigation(), page.click('form.mapping button[type="submit"]')]);
  await page.goto(base + '/projects');
  await page.click('details.versions > summary');
  await page.screenshot({ path: path.join(out, 'page-projects.png'), fullPage: true });
  await Promise.all([page.waitForNavigation(), page.click('details.versions button:has-text("Restore")')]);
  check(new URL(page.url()).pathname === '/', `restoring did not open the project: ${page.url()}`);
} catch (e) {
  failures.push(`the project form: ${e.message.split('\n')[0]} at ${page.url()}: ${(await page.content()).slice(0, 600)}`);
}

consoleErrors.splice(expectedErrors, consoleErrors.length - expectedErrors, ...consoleErrors.slice(expectedErrors).filter((e) => !/status of (400|404|422)|^404: /.test(e)));
check(consoleErrors.length === 0, `browser errors: ${consoleErrors.join('; ')}`);
await browser.close();
if (failures.length) {
  console.error(failures.map((f) => `FAIL ${f}`).join('\n'));
  process.exit(1);
}
console.log(`browser checks passed; screenshots in ${out}`);
