// Screenshots of every page at a projector's and a large screen's size, to look at.
// Usage: node screens.mjs BASE_URL OUT_DIR KEY TAG
// (tests/browser/screens.sh starts the servers; PNGs are for looking at, not committed.)
import { chromium } from 'playwright-core';
import fs from 'node:fs';
import path from 'node:path';

const [base, out, key, tag] = process.argv.slice(2);
fs.mkdirSync(out, { recursive: true });
const browser = await chromium.launch({
  executablePath: process.env.CHROMIUM || '/usr/bin/chromium',
  args: ['--headless', '--no-sandbox', '--disable-gpu', '--no-first-run'],
});
const pages = (process.env.PAGES || '/,/coverage,/model,/balance,/plan?replicates=10,/impact?wild_replicates=0,/projection,/sensitivity,/projects,/balance?view=present,/no-such-page').split(',');
for (const [w, h] of [[1024, 768], [1920, 1080]]) {
  const context = await browser.newContext({ viewport: { width: w, height: h } });
  const page = await context.newPage();
  await page.goto(base + '/?key=' + key);
  for (const p of pages) {
    await page.goto(base + p, { timeout: 120000 });
    const name = (p === '/' ? 'overview' : p.slice(1)).replace(/[^a-z0-9=-]+/gi, '_');
    await page.screenshot({ path: path.join(out, `${tag}-${w}-${name}.png`), fullPage: process.env.FULL === '1' });
    if (process.env.CHARTS === '1' && w === 1920) {
      const charts = page.locator('figure svg');
      for (let i = 0; i < await charts.count(); i++) {
        await charts.nth(i).screenshot({ path: path.join(out, `${tag}-chart-${name}-${i}.png`) });
      }
    }
  }
  await context.close();
}
await browser.close();
console.log(`screenshots in ${out}`);
