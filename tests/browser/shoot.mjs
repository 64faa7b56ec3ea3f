// Takes screenshots of pages for a human to look at: node shoot.mjs BASE_URL OUT_DIR path...
import { chromium } from 'playwright-core';
const [base, out, ...paths] = process.argv.slice(2);
const browser = await chromium.launch({ executablePath: '/usr/bin/chromium', args: ['--headless', '--no-sandbox', '--disable-gpu', '--disable-background-networking'] });
const page = await browser.newPage({ viewport: { width: 1366, height: 768 } });
for (const [i, p] of paths.entries()) {
  await page.goto(base + p);
  await page.screenshot({ path: `${out}/shot-${i}.png`, fullPage: true });
}
await browser.close();
