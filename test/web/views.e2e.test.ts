/**
 * The page in chromium, beyond one run's charts: choosing runs with the keyboard and comparing them,
 * zooming into a thinned run (its detail is fetched), surviving a server restart, and the layout at
 * 1280×800 and on a phone-sized screen. Same browser rules as page.e2e.test.ts.
 */
import { mkdtempSync, rmSync } from 'node:fs';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import type { Browser, Page } from 'playwright-core';
import { afterAll, beforeAll, describe, expect, it } from 'vitest';
import type { SinkRecord } from '../../src/protocol/records.js';
import { startServer, type RunningServer } from '../../src/server/serve.js';
import { openStore, type SqliteStore } from '../../src/storage/sqlite-store.js';
import { CHROMIUM, countColour, ensurePageBuilt, haveChromium, launchChromium } from '../helpers/browser.js';
import { freePort } from '../helpers/server-child.js';
import { formatNumber } from '../../src/web/model.js';
import { fakeMarkers, fakeRun, fakeWindows } from '../helpers/window-records.js';

const inCI = Boolean(process.env.CI);
const SHOTS = process.env.TIDEMARK_SCREENSHOTS ?? null;

const windowRecords = (ws: ReturnType<typeof fakeWindows>): SinkRecord[] => ws.map((window) => ({ type: 'window', window }));

/** Whether the page is wider than the window (a horizontal scroll bar on the page itself). */
const overflows = (page: Page): Promise<boolean> => page.evaluate(() => document.documentElement.scrollWidth > window.innerWidth + 1);

describe.skipIf(!haveChromium && !inCI)('the page in chromium: compare, zoom, restart, screens', () => {
  let dir: string;
  let store: SqliteStore;
  let server: RunningServer;
  let browser: Browser;
  const a = fakeRun({ id: 'run-cmp-000a', name: 'gearbox-lr-0.05', group: 'cmp', tags: { lr: '0.05' }, started_at: 1_700_000_000_000 });
  const b = fakeRun({ id: 'run-cmp-000b', name: 'gearbox-lr-0.2', group: 'cmp', tags: { lr: '0.2' }, started_at: 1_700_000_100_000 });
  // A long run of one layer: more windows than a backfill carries, so its view starts thinned.
  const long = fakeRun({ id: 'run-long-0001', name: 'gearbox-long', layers: 1, started_at: 1_600_000_000_000 });
  const LONG = 5000;

  beforeAll(async () => {
    if (!haveChromium) throw new Error(`No browser at ${CHROMIUM}: CI must install Debian's chromium (see .ci/run).`);
    ensurePageBuilt();
    dir = mkdtempSync(join(tmpdir(), 'tidemark-views-'));
    store = openStore(join(dir, 'runs.db'));
    store.beginRun(a);
    store.append([...windowRecords(fakeWindows(a, 12, 1, false)), ...fakeMarkers(a).map((marker): SinkRecord => ({ type: 'marker', marker }))]);
    store.beginRun(b);
    store.append(windowRecords(fakeWindows(b, 16, 2, false)));
    store.beginRun(long);
    store.append(windowRecords(fakeWindows(long, LONG, 3, false)));
    // Network markers before, inside and after the 800–1600 zoom of the test below.
    store.append(
      [100, 1200, 3000].map((step, i): SinkRecord => ({
        type: 'marker',
        marker: { run: long.id, layer: null, kind: i % 2 === 0 ? 'diffusion-start' : 'drift-start', step, detected_step: step + 16, confidence: 0.8, details: {} },
      })),
    );
    server = await startServer({ store, port: 0, pollMs: 50, onError: () => {} });
    browser = await launchChromium();
  }, 120_000);

  afterAll(async () => {
    await browser?.close();
    await server?.close();
    store?.close();
    if (dir !== undefined) rmSync(dir, { recursive: true, force: true });
  });

  it('picks two runs with the keyboard alone and overlays them, one colour each, in a view the URL reopens', async () => {
    const page = await browser.newPage({ viewport: { width: 1280, height: 800 } });
    const errors: string[] = [];
    page.on('pageerror', (e) => errors.push(String(e)));
    await page.goto(`${server.url}/`);
    await page.locator(`tr[data-run="${a.id}"]`).waitFor({ timeout: 10_000 });
    expect(await page.isDisabled('[data-testid="compare-button"]')).toBe(true);

    // Tab until the focus is on the first run's compare box, tick it with Space, and on to the second;
    // then back (Shift+Tab) to the Compare button and Enter.
    const tabTo = async (label: string, key = 'Tab'): Promise<void> => {
      for (let i = 0; i < 40; i++) {
        await page.keyboard.press(key);
        if ((await page.evaluate(() => document.activeElement?.getAttribute('aria-label') ?? document.activeElement?.textContent)) === label) return;
      }
      throw new Error(`${key} never reached ${label}`);
    };
    await tabTo(`Compare ${b.name}`);
    await page.keyboard.press('Space');
    // A run that starts meanwhile redraws the list; the focus and the tick stay where they were.
    const c = fakeRun({ id: 'run-cmp-000c', name: 'gearbox-started-later', started_at: 1_700_000_200_000 });
    store.beginRun(c);
    await page.locator(`tr[data-run="${c.id}"]`).waitFor({ timeout: 10_000 });
    expect(await page.evaluate(() => document.activeElement?.getAttribute('aria-label'))).toBe(`Compare ${b.name}`);
    expect(await page.isChecked(`tr[data-run="${b.id}"] input[type="checkbox"]`)).toBe(true);
    await tabTo(`Compare ${a.name}`);
    await page.keyboard.press('Space');
    expect(await page.textContent('[data-testid="compare-button"]')).toBe('Compare 2 runs');
    await tabTo('Compare 2 runs', 'Shift+Tab');
    await page.keyboard.press('Enter');

    // Newest first in the list, so b then a.
    await page.waitForFunction(() => location.hash.startsWith('#/compare/'));
    expect(new URL(page.url()).hash).toBe(`#/compare/${b.id},${a.id}`);
    const rows = page.locator('[data-testid="compare-runs"] tbody tr');
    await page.locator('[data-testid="compare-runs"] tbody tr', { hasText: '128' }).waitFor({ timeout: 10_000 });
    expect(await rows.count()).toBe(2);
    const texts = await rows.allTextContents();
    expect(texts[0]).toContain('gearbox-lr-0.2');
    expect(texts[0]).toContain('128'); // 16 windows of 8 steps
    expect(texts[1]).toContain('gearbox-lr-0.05');
    expect(texts[1]).toContain('96');
    // Run a has a diffusion-start marker for the network (fakeMarkers): its phase now is diffusion.
    expect(texts[1]).toContain('diffusion');
    expect(texts[0]).toContain('undetermined');
    // Each row's travel exponent is that run's latest network value, as stored.
    const exponentOf = (id: string): string => formatNumber(store.windows(id).at(-1)!.network.travel_exponent!);
    const cells = await page.$$eval('[data-testid="compare-runs"] tbody tr', (trs) => trs.map((tr) => tr.children[5]!.textContent));
    expect(cells).toEqual([exponentOf(b.id), exponentOf(a.id)]);
    expect(cells[0]).not.toBe(cells[1]);

    // Each run's line is drawn in its colour: the first Okabe & Ito blue, the second orange.
    const snr = '[data-testid="compare-snr"] canvas';
    await page.waitForSelector(snr);
    expect(await countColour(page, snr, [0x00, 0x72, 0xb2])).toBeGreaterThan(50);
    expect(await countColour(page, snr, [0xe6, 0x9f, 0x00])).toBeGreaterThan(50);
    for (const chart of ['compare-travel', 'compare-loss', 'compare-noise']) {
      const c = `[data-testid="${chart}"] canvas`;
      await page.waitForSelector(c);
      expect(await countColour(page, c, [0x00, 0x72, 0xb2])).toBeGreaterThan(20);
      expect(await countColour(page, c, [0xe6, 0x9f, 0x00])).toBeGreaterThan(20);
    }
    // The phase strip has one row per run, named after it.
    expect(await page.$$eval('[data-testid="compare-strip"] g.phase-row', (gs) => gs.map((g) => g.getAttribute('data-layer')))).toEqual([b.name, a.name]);
    expect(await page.textContent('.compare')).toContain('confirm any decision to stop training on held-out data');
    expect(await overflows(page)).toBe(false);
    if (SHOTS !== null) await page.screenshot({ path: join(SHOTS, 'compare.png'), fullPage: true });

    // A window of a compared run arrives live.
    store.append(windowRecords(fakeWindows(a, 13, 1, false).slice(12)));
    await page.locator('[data-testid="compare-runs"] tbody tr', { hasText: '104' }).waitFor({ timeout: 5_000 });

    // The link reopens the same comparison.
    const again = await browser.newPage();
    await again.goto(page.url());
    await again.locator('[data-testid="compare-runs"] tbody tr', { hasText: 'gearbox-lr-0.05' }).waitFor({ timeout: 10_000 });
    await again.close();
    expect(errors).toEqual([]);
    await page.close();
  });

  it('refuses a comparison of one run, and says which run of a comparison does not exist', async () => {
    const page = await browser.newPage();
    await page.goto(`${server.url}/#/compare/${a.id}`);
    expect(await page.locator('[data-testid="compare-error"]').textContent({ timeout: 10_000 })).toContain('2 to 6 runs');
    await page.goto(`${server.url}/#/compare/${a.id},no-such-run`);
    expect(await page.locator('[data-testid="run-error"]').textContent({ timeout: 10_000 })).toContain('No run matches “no-such-run”');
    await page.locator('[data-testid="compare-runs"] tbody tr', { hasText: 'gearbox-lr-0.05' }).waitFor({ timeout: 10_000 });
    await page.close();
  });

  it('opens a long run thinned, and fetches a zoomed range in full detail', async () => {
    const page = await browser.newPage({ viewport: { width: 1280, height: 800 } });
    const errors: string[] = [];
    page.on('pageerror', (e) => errors.push(String(e)));
    await page.goto(`${server.url}/#/run/${long.id}`);
    const facts = page.locator('[data-testid="run-facts"]');
    await facts.filter({ hasText: `${LONG} windows` }).waitFor({ timeout: 15_000 });
    // The backfill carries 2000 of the 5000 windows.
    expect(await facts.textContent()).toContain('(2000 drawn)');

    // Steps 800 to 1600 hold 101 windows (one every 8 steps); the backfill has about 40 of them.
    const detail = page.waitForRequest((r) => r.url().includes('/windows?from=800&to=1600'));
    await page.fill('[data-testid="range-from"]', '800');
    await page.fill('[data-testid="range-to"]', '1600');
    await page.keyboard.press('Enter');
    await detail;
    await facts.filter({ hasText: /\((20[6-9]\d) drawn\)/ }).waitFor({ timeout: 10_000 });
    expect(await page.textContent('[data-testid="detail-note"]')).toContain('full detail');
    // The range is in the URL; every chart shows it.
    expect(new URL(page.url()).hash).toBe(`#/run/${long.id}?steps=800-1600`);
    const shown = (): Promise<(string | null)[]> => page.$$eval('[data-testid$="-chart"][data-steps]', (boxes) => boxes.map((b) => b.getAttribute('data-steps')));
    // Phase level, window SNR, travel, loss and noise scale.
    await page.waitForFunction(() => document.querySelectorAll('[data-testid$="-chart"][data-steps="800-1600"]').length === 5);
    expect(await shown()).toEqual(['800-1600', '800-1600', '800-1600', '800-1600', '800-1600']);
    // The phase strip draws only the marker inside the range (those at 100 and 3000 used to sit on its edges),
    // and labels its log step axis.
    await page.waitForFunction(() => document.querySelectorAll('[data-testid="strip-axis"] text').length >= 1);
    const ticks = await page.$$eval('.phase-row[data-layer="(network)"] .phase-tick title, .phase-row .phase-tick title', (ts) => [...new Set(ts.map((t) => t.textContent))]);
    expect(ticks.filter((t) => t !== null && /at step (100|3000) /.test(t))).toEqual([]);
    expect(ticks.some((t) => t !== null && t.includes('at step 1200 '))).toBe(true);
    const axisLabels = await page.$$eval('[data-testid="strip-axis"] text', (ts) => ts.map((t) => t.textContent));
    expect(axisLabels).toContain('1000');

    // "Whole run" goes back and takes the range out of the URL; the detail stays merged in.
    await page.click('[data-testid="range-whole"]');
    expect(await page.inputValue('[data-testid="range-from"]')).toBe('');
    expect(new URL(page.url()).hash).toBe(`#/run/${long.id}`);

    // A drag across the phase-level chart (the first) zooms every chart: the form and the URL take the dragged range.
    const over = await page.locator('[data-testid="level-chart"] .u-over').boundingBox();
    if (over === null) throw new Error('no plotting area');
    await page.mouse.move(over.x + over.width * 0.4, over.y + over.height / 2);
    await page.mouse.down();
    await page.mouse.move(over.x + over.width * 0.6, over.y + over.height / 2, { steps: 5 });
    await page.mouse.up();
    await page.waitForFunction(() => location.hash.includes('steps='));
    const from = Number(await page.inputValue('[data-testid="range-from"]'));
    const to = Number(await page.inputValue('[data-testid="range-to"]'));
    expect(from).toBeGreaterThan(8);
    expect(to).toBeGreaterThan(from);
    expect(to).toBeLessThan(LONG * 8);
    await page.waitForFunction((r) => Array.from(document.querySelectorAll('[data-testid$="-chart"][data-steps]')).every((b) => b.getAttribute('data-steps') === r), `${from}-${to}`);
    expect(await shown()).toEqual(Array(5).fill(`${from}-${to}`));
    // A double click goes back to the whole run.
    await page.mouse.dblclick(over.x + over.width / 2, over.y + over.height / 2);
    await page.waitForFunction(() => !location.hash.includes('steps='));
    expect(await shown()).toEqual(Array(5).fill(`8-${LONG * 8}`));
    expect(await page.inputValue('[data-testid="range-from"]')).toBe('');

    // A link with a range opens zoomed, and fetches that range's detail by itself.
    const linked = await browser.newPage({ viewport: { width: 1280, height: 800 } });
    const detailAgain = linked.waitForRequest((r) => r.url().includes('/windows?from=2000&to=3000'));
    await linked.goto(`${server.url}/#/run/${long.id}?steps=2000-3000`);
    await detailAgain;
    expect(await linked.inputValue('[data-testid="range-from"]')).toBe('2000');
    await linked.locator('[data-testid="detail-note"]', { hasText: 'full detail' }).waitFor({ timeout: 10_000 });
    await linked.close();
    expect(errors).toEqual([]);
    await page.close();
  });

  it('reconnects by itself after a server restart and shows what was stored meanwhile', async () => {
    const port = await freePort();
    const run = fakeRun({ id: 'run-restart-01', name: 'gearbox-restart' });
    const all = fakeWindows(run, 10, 4, false);
    store.beginRun(run);
    store.append(windowRecords(all.slice(0, 6)));
    let s = await startServer({ store, port, pollMs: 50, onError: () => {} });
    const page = await browser.newPage();
    try {
      await page.goto(`${s.url}/#/run/${run.id}`);
      await page.locator('[data-testid="run-step"]', { hasText: '48' }).waitFor({ timeout: 10_000 });
      await s.close();
      await page.locator('[data-testid="connection"]', { hasText: 'reconnecting' }).waitFor({ timeout: 10_000 });
      // Written while no server was up: the page must fetch these after it reconnects.
      store.append(windowRecords(all.slice(6)));
      s = await startServer({ store, port, pollMs: 50, onError: () => {} });
      await page.locator('[data-testid="connection"]', { hasText: 'live' }).waitFor({ timeout: 20_000 });
      await page.locator('[data-testid="run-step"]', { hasText: '80' }).waitFor({ timeout: 10_000 });
      expect(await page.textContent('[data-testid="run-facts"]')).toContain('10 windows');
    } finally {
      await page.close();
      await s.close();
    }
  });

  it('fits a 1280×800 screen and a phone-sized one without a sideways scroll', async () => {
    for (const viewport of [
      { width: 1280, height: 800 },
      { width: 390, height: 844 },
    ]) {
      const page = await browser.newPage({ viewport });
      await page.goto(`${server.url}/#/run/${a.id}`);
      await page.waitForSelector('[data-testid="noise-chart"] canvas', { timeout: 10_000 });
      expect(await overflows(page)).toBe(false);
      const widest = await page.$$eval('canvas, svg', (els) => Math.max(...els.map((e) => e.getBoundingClientRect().right)));
      expect(widest).toBeLessThanOrEqual(viewport.width);
      // Marker rows stay one or two lines high: the details column keeps a readable width (it used to wrap
      // one letter per line at 390 px, rows about 200 px tall), and a table wider than the screen says so.
      const rowHeights = await page.$$eval('[data-testid="markers"] tbody tr', (rows) => rows.map((r) => r.getBoundingClientRect().height));
      expect(rowHeights.length).toBeGreaterThan(0);
      expect(Math.max(...rowHeights)).toBeLessThan(60);
      const hintShown = async (scope: string): Promise<{ scrolls: boolean; hint: boolean }> =>
        page.$eval(scope, (wrap) => {
          const box = wrap.querySelector('.scroll')!;
          const hint = wrap.querySelector('[data-testid="scroll-hint"]') as HTMLElement;
          return { scrolls: box.scrollWidth > box.clientWidth + 1, hint: !hint.hidden };
        });
      await page.waitForTimeout(100);
      const markersWrap = await hintShown('.scroll-wrap:has([data-testid="markers"])');
      expect(markersWrap.hint).toBe(markersWrap.scrolls);
      if (viewport.width < 500) expect(markersWrap.scrolls).toBe(true);
      // The information plane's axis titles fit inside it.
      for (const t of await page.$$eval('.plane svg text[data-testid="plane-x-title"]', (ts) => ts.map((x) => ({ right: x.getBoundingClientRect().right, left: x.getBoundingClientRect().left, svgRight: x.closest('svg')!.getBoundingClientRect().right })))) {
        expect(t.right).toBeLessThanOrEqual(t.svgRight + 1);
        expect(t.left).toBeGreaterThanOrEqual(0);
      }
      if (SHOTS !== null && viewport.width < 500) await page.screenshot({ path: join(SHOTS, 'run-narrow.png'), fullPage: true });
      await page.goto(`${server.url}/`);
      await page.locator(`tr[data-run="${a.id}"]`).waitFor({ timeout: 10_000 });
      expect(await overflows(page)).toBe(false);
      await page.waitForTimeout(100);
      const runsWrap = await hintShown('.scroll-wrap:has(table)');
      expect(runsWrap.hint).toBe(runsWrap.scrolls);
      await page.close();
    }
  });
});
