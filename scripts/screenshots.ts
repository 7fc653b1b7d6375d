/**
 * `npm run screenshots`: trains the gearbox demo twice (two learning rates) into a scratch store, then two
 * groups (five seeds of one network; a small depth sweep), serves it, and photographs the page's main views
 * with Debian's chromium into docs/screenshots/ (the README shows them). Needs /usr/bin/chromium; takes
 * about three minutes.
 *
 *   npx tsx scripts/screenshots.ts [--epochs N] [--out DIR]
 */
import { spawnSync } from 'node:child_process';
import { mkdirSync, mkdtempSync, rmSync } from 'node:fs';
import { tmpdir } from 'node:os';
import { join, resolve } from 'node:path';
import { fileURLToPath } from 'node:url';
import { parseArgs } from 'node:util';
import { runDepthSweep } from '../examples/depth-sweep.js';
import { startServer } from '../src/server/serve.js';
import { openStore } from '../src/storage/sqlite-store.js';
import { CHROMIUM, ensurePageBuilt, haveChromium, launchChromium } from '../test/helpers/browser.js';
import { freePort } from '../test/helpers/server-child.js';

const ROOT = fileURLToPath(new URL('..', import.meta.url));
const { values } = parseArgs({ options: { epochs: { type: 'string', default: '60' }, out: { type: 'string', default: join(ROOT, 'docs/screenshots') } } });
const epochs = Number(values.epochs);
if (!Number.isInteger(epochs) || epochs < 5) {
  console.error('screenshots: --epochs must be an integer ≥ 5');
  process.exit(2);
}
if (!haveChromium) {
  console.error(`screenshots: no browser at ${CHROMIUM}; apt-get install chromium`);
  process.exit(1);
}
const out = resolve(values.out);
mkdirSync(out, { recursive: true });
ensurePageBuilt();

const dir = mkdtempSync(join(tmpdir(), 'tidemark-shots-'));
const db = join(dir, 'runs.db');
try {
  for (const lr of ['0.01', '0.05']) {
    console.log(`training the gearbox demo, lr ${lr}, ${epochs} epochs…`);
    const r = spawnSync(process.execPath, ['--import', 'tsx', join(ROOT, 'examples/gearbox-demo.ts'), '--epochs', String(epochs), '--lr', lr, '--out', db, '--exit', '--port', String(await freePort())], {
      cwd: ROOT,
      stdio: ['ignore', 'ignore', 'inherit'],
    });
    if (r.status !== 0) throw new Error(`the demo exited with ${r.status}`);
  }
  // Two groups for the group view: five seeds of one network, and a small depth sweep (depths 1, 2, 4 × 2 seeds).
  console.log('training the gearbox classifier: 5 seeds at depth 3, then depths 1, 2, 4 × 2 seeds…');
  const quiet = { onWarning: () => {} };
  await runDepthSweep({ depths: [3], seeds: [1, 2, 3, 4, 5], epochs: 45, store: db, group: 'gearbox-seeds', ...quiet });
  await runDepthSweep({ depths: [1, 2, 4], seeds: [1, 2], epochs: 45, store: db, group: 'depth-sweep', ...quiet });
  const store = openStore(db);
  const server = await startServer({ store, port: 0, onError: () => {} });
  const browser = await launchChromium();
  try {
    const runs = store.runs().filter((r) => r.group === null);
    const [older, newer] = [runs[1]!, runs[0]!];
    const page = await browser.newPage({ viewport: { width: 1280, height: 800 } });
    const shot = async (name: string, fullPage: boolean): Promise<void> => {
      await page.screenshot({ path: join(out, name), fullPage });
      console.log(`wrote ${join(out, name)}`);
    };
    await page.goto(`${server.url}/`);
    await page.locator(`tr[data-run="${newer.id}"]`).waitFor();
    await shot('runs.png', false);

    await page.goto(`${server.url}/#/run/${older.id}`);
    await page.locator('[data-testid="info-section"] .info-point').first().waitFor();
    await page.waitForSelector('[data-testid="noise-chart"] canvas');
    await shot('run.png', false);
    await shot('run-full.png', true);

    await page.goto(`${server.url}/#/compare/${older.id},${newer.id}`);
    await page.waitForSelector('[data-testid="compare-noise"] canvas');
    await page.locator('[data-testid="compare-runs"] tbody tr', { hasText: 'diffusion' }).first().waitFor();
    await shot('compare.png', true);

    await page.goto(`${server.url}/#/group/gearbox-seeds`);
    await page.locator('[data-testid="group-transitions"] g.transition-row').first().waitFor();
    await shot('group.png', true);

    await page.goto(`${server.url}/#/group/depth-sweep?sweep=depth&outcome=diffusion-start`);
    await page.locator('[data-testid="sweep-fit"]').waitFor();
    await page.locator('[data-testid="sweep-chart"]').scrollIntoViewIfNeeded();
    await shot('sweep.png', false);

    await page.setViewportSize({ width: 390, height: 844 });
    await page.goto(`${server.url}/#/run/${older.id}`);
    await page.waitForSelector('[data-testid="snr-chart"] canvas');
    await page.locator('[data-testid="phase-strip"] svg').waitFor();
    await page.reload();
    await page.waitForSelector('[data-testid="snr-chart"] canvas');
    await page.locator('[data-testid="phase-strip"] svg').waitFor();
    await shot('run-narrow.png', false);
  } finally {
    await browser.close();
    await server.close();
    store.close();
  }
} finally {
  rmSync(dir, { recursive: true, force: true });
}
