/**
 * The group view in chromium (issue 15): five runs of one group, each layer's transition as dots with its
 * median and interval, the bands of three quantities, what each run reached, a sweep with its fitted line
 * and the interval text (the same numbers as the API's), aligning by epoch, and a band that grows while a
 * run of the group writes windows. Same browser rules as page.e2e.test.ts.
 */
import { mkdtempSync, rmSync } from 'node:fs';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import type { Browser, Page } from 'playwright-core';
import { afterAll, beforeAll, describe, expect, it } from 'vitest';
import type { Marker, SinkRecord } from '../../src/protocol/records.js';
import { startServer, type RunningServer } from '../../src/server/serve.js';
import { openStore, type SqliteStore } from '../../src/storage/sqlite-store.js';
import { CHROMIUM, ensurePageBuilt, haveChromium, launchChromium } from '../helpers/browser.js';
import { fakeRun, fakeWindows } from '../helpers/window-records.js';

const inCI = Boolean(process.env.CI);
const SHOTS = process.env.TIDEMARK_SCREENSHOTS ?? null;
const GROUP = 'gearbox seeds';
// Where each run's network and first layer began to diffuse (the first layer: run 3 never did).
const NETWORK = [96, 120, 80, 144, 104];
const FIRST = [40, 64, 48, null, 56];

describe.skipIf(!haveChromium && !inCI)('the group view in chromium', () => {
  let dir: string;
  let store: SqliteStore;
  let server: RunningServer;
  let browser: Browser;
  const runs = NETWORK.map((_, k) => fakeRun({ id: `grp-run-${k}`, name: `seed ${k + 1}`, group: GROUP, tags: { depth: String(k + 1), seed: String(k + 1) }, started_at: 1_700_000_000_000 + k }));

  beforeAll(async () => {
    if (!haveChromium) throw new Error(`No browser at ${CHROMIUM}: CI must install Debian's chromium (see .ci/run).`);
    ensurePageBuilt();
    dir = mkdtempSync(join(tmpdir(), 'tidemark-group-view-'));
    store = openStore(join(dir, 'runs.db'));
    runs.forEach((run, k) => {
      store.beginRun(run);
      const markers: Marker[] = [{ run: run.id, layer: null, kind: 'diffusion-start', step: NETWORK[k]!, detected_step: NETWORK[k]! + 16, confidence: 0.8, details: {} }];
      if (FIRST[k] !== null) markers.push({ run: run.id, layer: run.layers[0]!.name, kind: 'diffusion-start', step: FIRST[k]!, detected_step: FIRST[k]! + 8, confidence: 0.7, details: {} });
      if (k === 2) markers.push({ run: run.id, layer: null, kind: 'advice', step: 152, detected_step: 152, confidence: 0.6, details: { verdict: 'stop' } });
      store.append([...fakeWindows(run, 20, 40 + k, false).map((window): SinkRecord => ({ type: 'window', window })), ...markers.map((marker): SinkRecord => ({ type: 'marker', marker }))]);
    });
    server = await startServer({ store, port: 0, pollMs: 50, onError: () => {} });
    browser = await launchChromium();
  }, 120_000);

  afterAll(async () => {
    await browser?.close();
    await server?.close();
    store?.close();
    if (dir !== undefined) rmSync(dir, { recursive: true, force: true });
  });

  const open = async (hash: string): Promise<{ page: Page; errors: string[] }> => {
    const page = await browser.newPage({ viewport: { width: 1280, height: 900 } });
    const errors: string[] = [];
    page.on('pageerror', (e) => errors.push(String(e)));
    await page.goto(`${server.url}/${hash}`);
    await page.locator('[data-testid="group-runs"] tbody tr').first().waitFor({ timeout: 10_000 });
    return { page, errors };
  };

  it('draws every layer’s transitions as dots with median and interval, and the three bands of the network', async () => {
    const { page, errors } = await open(`#/group/${encodeURIComponent(GROUP)}`);
    expect(await page.textContent('[data-testid="group-title"]')).toBe(`Group ${GROUP}`);
    expect(await page.textContent('[data-testid="group-facts"]')).toContain('5 runs, aligned by step');
    // A row per layer and the network; a dot per run that reached it.
    const rows = page.locator('[data-testid="group-transitions"] g.transition-row');
    expect(await rows.count()).toBe(4);
    expect(await page.locator('g.transition-row[data-layer="(network)"] circle.transition-dot').count()).toBe(5);
    expect(await page.locator(`g.transition-row[data-layer="${runs[0]!.layers[0]!.name}"] circle.transition-dot`).count()).toBe(4);
    expect(await page.locator('g.transition-row[data-layer="(network)"] rect.transition-median').count()).toBe(1);
    expect(await page.locator('g.transition-row[data-layer="(network)"] line.transition-interval').count()).toBe(1);
    // The text states the same median the API gives (104 = the median of the five steps, written above).
    const api = (await (await fetch(`${server.url}/api/groups/${encodeURIComponent(GROUP)}`)).json()) as { layers: { position: number | null; transition: { median: number; low: number; high: number } }[] };
    const net = api.layers.find((l) => l.position === null)!.transition;
    expect(net.median).toBe(104);
    expect(await page.textContent('[data-testid="group-transition-text"] li[data-layer="(network)"]')).toContain(`median step ${net.median}, 95 % interval step ${net.low} to step ${net.high}, over 5 of 5 runs`);
    for (const box of ['group-band-snr', 'group-band-noise', 'group-band-travel']) {
      for (const part of ['band-range', 'band-quartiles', 'band-median']) {
        const d = await page.getAttribute(`[data-testid="${box}"] [data-testid="${part}"]`, part === 'band-median' ? 'points' : 'd');
        expect(d, `${box} ${part}`).toMatch(/\d/);
      }
      expect(Number(await page.getAttribute(`[data-testid="${box}"]`, 'data-runs'))).toBe(5);
      expect(Number(await page.getAttribute(`[data-testid="${box}"]`, 'data-points'))).toBeGreaterThan(10);
    }
    // The run that reached a stop says so, where.
    expect(await page.textContent(`[data-testid="group-runs"] tr[data-run="grp-run-2"]`)).toContain('stop at step 152');
    if (SHOTS !== null) await page.screenshot({ path: join(SHOTS, 'group.png'), fullPage: true });
    expect(errors).toEqual([]);
    await page.close();
  });

  it('fits a sweep over a numeric tag: the fitted line and the interval text, the numbers of the API', async () => {
    const { page, errors } = await open(`#/group/${encodeURIComponent(GROUP)}`);
    await page.selectOption('[data-testid="sweep-tag"]', 'depth');
    await page.click('[data-testid="sweep-form"] button[type="submit"]');
    await page.locator('[data-testid="sweep-fit"]').waitFor({ timeout: 10_000 });
    expect(new URL(page.url()).hash).toBe(`#/group/${encodeURIComponent(GROUP)}?sweep=depth`);
    const api = (await (await fetch(`${server.url}/api/groups/${encodeURIComponent(GROUP)}?sweep=depth`)).json()) as { sweep: { fit: { slope: number; ci95: [number, number] }; bootstrap: { low: number; high: number } } };
    const text = (await page.textContent('[data-testid="sweep-text"]'))!;
    expect(text).toContain(`Exponent b = ${api.sweep.fit.slope.toFixed(3)}, 95 % interval [${api.sweep.fit.ci95[0].toFixed(3)}, ${api.sweep.fit.ci95[1].toFixed(3)}] (Student-t over 5 runs)`);
    expect(text).toContain(`[${api.sweep.bootstrap.low.toFixed(3)}, ${api.sweep.bootstrap.high.toFixed(3)}] by bootstrap`);
    expect(await page.locator('[data-testid="sweep-chart"] circle.sweep-point').count()).toBe(5);
    expect(await page.locator('[data-testid="sweep-chart"] circle.sweep-residual').count()).toBe(5);
    // The x axis is labelled at the tag's own values (depth 1 to 5), 4 included, which a 1-2-5 ladder misses.
    const xLabels = await page.locator('[data-testid="sweep-chart"] svg').first().locator('g.axes text[text-anchor="middle"]').allTextContents();
    expect(xLabels.filter((t) => /^\d+$/.test(t))).toEqual(['1', '2', '3', '4', '5']);
    expect(errors).toEqual([]);
    await page.close();
  });

  it('aligns by epoch on request, and a run’s new windows reach the view while it is open', async () => {
    const { page, errors } = await open(`#/group/${encodeURIComponent(GROUP)}`);
    await page.check('[data-testid="group-align-epoch"]');
    await page.waitForFunction(() => document.querySelector('[data-testid="group-facts"]')?.textContent?.includes('aligned by epoch'));
    expect(new URL(page.url()).hash).toContain('align=epoch');
    // 80 minibatches an epoch in these runs: the network's median 104 steps is 1.30 epochs.
    expect(await page.textContent('[data-testid="group-transition-text"] li[data-layer="(network)"]')).toContain('median epoch 1.30');
    // Run 0 writes 10 more windows (to step 240): its row and the bands follow without a reload.
    const more = fakeWindows(runs[0]!, 30, 40, false).slice(20);
    store.append(more.map((window): SinkRecord => ({ type: 'window', window })));
    await page.waitForFunction(() => document.querySelector('[data-testid="group-runs"] tr[data-run="grp-run-0"]')?.textContent?.includes('240'), undefined, { timeout: 15_000 });
    // On the grid past step 160 (epoch 2) only run 0 has values: the band's points there rest on one run.
    const titles = await page.$$eval('[data-testid="group-band-travel"] circle.band-point title', (ts) => ts.map((t) => t.textContent ?? ''));
    expect(titles.some((t) => t.startsWith('epoch 3.00') && t.endsWith('over 1 run'))).toBe(true);
    expect(errors).toEqual([]);
    await page.close();
  });

  it('links each group from the runs list', async () => {
    const page = await browser.newPage();
    await page.goto(`${server.url}/`);
    await page.locator(`tr[data-run="grp-run-0"] a[href*="#/group/"]`).click();
    await page.locator('[data-testid="group-title"]').waitFor({ timeout: 10_000 });
    expect(await page.textContent('[data-testid="group-title"]')).toBe(`Group ${GROUP}`);
    await page.close();
  });
});
