/**
 * The page in a real browser: Debian's chromium driven by playwright-core against a server on a temp
 * SQLite store. Needs /usr/bin/chromium (CI installs it in .ci/run; there a missing browser fails the
 * test). The page is built first when dist/web is missing.
 */
import { mkdtempSync, rmSync } from 'node:fs';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import type { Browser } from 'playwright-core';
import { afterAll, beforeAll, describe, expect, it } from 'vitest';
import type { Marker, SinkRecord, WindowRecord } from '../../src/protocol/records.js';
import { startServer, type RunningServer } from '../../src/server/serve.js';
import { openStore, type SqliteStore } from '../../src/storage/sqlite-store.js';
import { CHROMIUM, countColour, ensurePageBuilt, haveChromium, inkPixels, launchChromium } from '../helpers/browser.js';
import { formatNumber, settingText } from '../../src/web/model.js';
import { fakeMarkers, fakeRun, fakeWindows } from '../helpers/window-records.js';

const inCI = Boolean(process.env.CI);
const SHOTS = process.env.TIDEMARK_SCREENSHOTS ?? null;

if (!haveChromium && !inCI) {
  console.warn(`test/web/page.e2e.test.ts skipped: no browser at ${CHROMIUM} (apt-get install chromium to run it).`);
}

/** Probe values on the even windows and the last one; windows 0 and 2 saturated, so they must be drawn hollow. */
function withProbe(ws: WindowRecord[]): WindowRecord[] {
  return ws.map((w) => {
    if (w.index % 2 === 1 && w.index !== 13) return w;
    const layers = Object.fromEntries(
      Object.entries(w.layers).map(([name, s], j) => [
        name,
        { ...s, mi_input: 6 - 0.2 * w.index - j, mi_label: 0.2 + 0.06 * w.index + 0.1 * j, mi_saturated: w.index <= 2 ? 1 : 0, act_saturation: 0.1, probe_rows: 256 },
      ]),
    );
    return { ...w, layers };
  });
}

/**
 * Both estimators on the even windows, as a probe with the noise scaled to each layer writes them: the two
 * hidden layers' binned estimate saturated at log2 1024 = 10 bits (as on the demo), their pairwise one moving;
 * the output layer unsaturated in both.
 */
function withPairwise(ws: WindowRecord[]): WindowRecord[] {
  return ws.map((w) => {
    if (w.index % 2 === 1) return w;
    const k = w.index / 2;
    const layers = Object.fromEntries(
      Object.entries(w.layers).map(([name, s], j) => {
        const hidden = j < 2;
        const upper = hidden ? 6 - 0.3 * k + 0.5 * j : 3 - 0.2 * k;
        return [
          name,
          {
            ...s,
            mi_input: hidden ? 10 : 4 - 0.2 * k,
            mi_label: hidden ? 1.5 : 0.4 + 0.15 * k,
            mi_saturated: hidden ? 1 : 0,
            probe_rows: 1024,
            mi_input_upper: upper,
            mi_input_lower: upper - 1,
            mi_label_pairwise: 0.3 + 0.2 * k + 0.05 * j,
            mi_label_linear: 0.8 + 0.1 * k + 0.05 * j,
            mi_bounds_saturated: 0,
            mi_noise_variance: 0.05 * (j + 1) * (1 + 0.1 * k),
          },
        ];
      }),
    );
    return { ...w, layers };
  });
}

describe.skipIf(!haveChromium && !inCI)('the page in chromium', () => {
  let dir: string;
  let store: SqliteStore;
  let server: RunningServer;
  let browser: Browser;
  const run = fakeRun({ id: 'run-e2e-0001', name: 'gearbox-e2e', group: 'e2e', tags: { lr: '0.05' } });
  const windows = withProbe(fakeWindows(run, 14));
  // A second run with no probe values: its information plane stays hidden.
  const bare = fakeRun({ id: 'run-e2e-0002', name: 'no-probe-e2e' });
  // A run with both estimators and the probe's settings in its config.
  const paired = {
    ...fakeRun({ id: 'run-e2e-0003', name: 'pairwise-e2e' }),
    config: {
      window: 'auto',
      probe: {
        rows: 1024,
        every: 2,
        labels: { kind: 'classes', classes: 3 },
        binned: { estimator: 'binned-plugin', bins: 30, saturation_margin_bits: 0.1 },
        bounds: { estimator: 'pairwise-kolchinsky-tracey', noise_variance: null, noise_ratio: 0.2, rows: 512 },
      },
    },
  };
  const pairedWindows = withPairwise(fakeWindows(paired, 10));
  const advice: Marker = {
    run: run.id,
    layer: null,
    kind: 'advice',
    step: 80,
    detected_step: 80,
    confidence: 1,
    details: { verdict: 'may-stop', reason: 'network SNR under its floor for 3 windows', source: 'online' },
  };

  beforeAll(async () => {
    if (!haveChromium) throw new Error(`No browser at ${CHROMIUM}: CI must install Debian's chromium (see .ci/run).`);
    ensurePageBuilt();
    dir = mkdtempSync(join(tmpdir(), 'tidemark-web-'));
    store = openStore(join(dir, 'runs.db'));
    store.beginRun(run);
    store.append([
      ...windows.slice(0, 12).map((window): SinkRecord => ({ type: 'window', window })),
      ...[...fakeMarkers(run), advice].map((marker): SinkRecord => ({ type: 'marker', marker })),
    ]);
    store.beginRun(bare);
    store.append(fakeWindows(bare, 6).map((window): SinkRecord => ({ type: 'window', window })));
    store.beginRun(paired);
    store.append(pairedWindows.map((window): SinkRecord => ({ type: 'window', window })));
    server = await startServer({ store, port: 0, pollMs: 50, onError: () => {} });
    browser = await launchChromium();
  });

  afterAll(async () => {
    await browser?.close();
    await server?.close();
    store?.close();
    if (dir !== undefined) rmSync(dir, { recursive: true, force: true });
  });

  it('lists the run, draws its SNR chart, shows a new window live and keeps the view in the URL', async () => {
    const page = await browser.newPage({ viewport: { width: 1200, height: 900 } });
    const errors: string[] = [];
    page.on('pageerror', (e) => errors.push(String(e)));
    // Every request the page makes on load is answered (no favicon 404, no missing asset).
    const missing: string[] = [];
    page.on('response', (r) => {
      if (r.status() === 404) missing.push(r.url());
    });
    await page.goto(`${server.url}/`);
    const row = page.locator(`tr[data-run="${run.id}"]`);
    await row.waitFor({ timeout: 10_000 });
    expect(missing).toEqual([]);
    expect(await row.textContent()).toContain('gearbox-e2e');
    expect(await row.textContent()).toContain('lr=0.05');

    // The filter hides the run for a word it does not hold and shows it for its tag.
    await page.fill('[data-testid="run-filter"]', 'no-such-thing');
    expect(await row.count()).toBe(0);
    await page.fill('[data-testid="run-filter"]', 'lr=0.05');
    expect(await row.count()).toBe(1);
    if (SHOTS !== null) await page.screenshot({ path: join(SHOTS, 'runs.png'), fullPage: true });

    await row.locator('a[href*="#/run/"]').click();
    expect(new URL(page.url()).hash).toBe(`#/run/${run.id}`);
    await page.locator('[data-testid="run-step"]', { hasText: '96' }).waitFor({ timeout: 10_000 });
    const canvas = '[data-testid="snr-chart"] canvas';
    await page.waitForSelector(canvas);
    // Layer 1 is Okabe & Ito blue (#0072B2), layer 2 orange (#E69F00), the network black: the lines are drawn.
    const blue = await countColour(page, canvas, [0x00, 0x72, 0xb2]);
    const orange = await countColour(page, canvas, [0xe6, 0x9f, 0x00]);
    expect(blue).toBeGreaterThan(50);
    expect(orange).toBeGreaterThan(50);
    // The legend shows the latest window's values without hovering (it showed "--" until the pointer came by).
    const legendValues = await page.$$eval('[data-testid="snr-chart"] .u-legend .u-value', (vs) => vs.map((v) => v.textContent ?? ''));
    expect(legendValues.length).toBeGreaterThan(1);
    expect(legendValues.filter((v) => v.trim() === '--')).toEqual([]);
    expect(await page.textContent('[data-testid="advice"]')).toContain('may be near');
    // The tab title carries the run's state: the network entered diffusion at step 40 (fakeMarkers), advice may-stop.
    expect(await page.title()).toBe('gearbox-e2e · step 96 · diffusion · may-stop — tidemark');
    expect(await page.textContent('[data-testid="caution"]')).toContain('confirm any decision to stop training on held-out data');
    const markerRows = await page.locator('[data-testid="markers"] tbody tr').allTextContents();
    expect(markerRows.some((t) => t.includes('drift-start') && t.includes('dense_Dense1'))).toBe(true);
    expect(markerRows).toHaveLength(4);
    if (SHOTS !== null) await page.screenshot({ path: join(SHOTS, 'run.png'), fullPage: true });

    // A window written to the store reaches the open page without a reload.
    const before = await page.evaluate(() => performance.getEntriesByType('navigation').length + location.href);
    store.append([{ type: 'window', window: windows[12]! }]);
    await page.locator('[data-testid="run-step"]', { hasText: '104' }).waitFor({ timeout: 5_000 });
    expect(await page.evaluate(() => performance.getEntriesByType('navigation').length + location.href)).toBe(before);

    // The link reopens the same view in a fresh page.
    const again = await browser.newPage();
    await again.goto(page.url());
    expect(await again.locator('[data-testid="run-name"]', { hasText: 'gearbox-e2e' }).textContent({ timeout: 10_000 })).toBe('gearbox-e2e');
    await again.close();
    expect(errors).toEqual([]);
    await page.close();
  });

  it('draws the phase strip, weight travel, loss, noise scale and information plane, and updates them live', async () => {
    const page = await browser.newPage({ viewport: { width: 1200, height: 900 } });
    const errors: string[] = [];
    page.on('pageerror', (e) => errors.push(String(e)));
    await page.goto(`${server.url}/#/run/${run.id}`);
    await page.locator('[data-testid="run-step"]', { hasText: '104' }).waitFor({ timeout: 10_000 });

    // Phase strip: the network row on top, then one row per layer, from the stored markers.
    const strip = '[data-testid="phase-strip"] svg';
    await page.waitForSelector(strip);
    expect(await page.$$eval(`${strip} g.phase-row`, (gs) => gs.map((g) => g.getAttribute('data-layer')))).toEqual(['(network)', 'dense_Dense1', 'dense_Dense2', 'dense_Dense3']);
    const phasesOf = (layer: string): Promise<string[]> => page.$$eval(`${strip} g.phase-row[data-layer="${layer}"] rect.phase-seg`, (rs) => rs.map((r) => r.getAttribute('data-phase')!));
    expect(await phasesOf('(network)')).toEqual(['undetermined', 'diffusion']);
    expect(await phasesOf('dense_Dense1')).toEqual(['drift']); // its drift-start is at step 8, the first window
    expect(await phasesOf('dense_Dense2')).toEqual(['undetermined']); // its only marker is a nonfinite one
    expect(await page.locator(`${strip} line.phase-tick`).count()).toBe(2);
    // Segments have width and sit in the SNR chart's plotting area: the diffusion band ends at the right edge.
    const widths = await page.$$eval(`${strip} rect.phase-seg`, (rs) => rs.map((r) => Number(r.getAttribute('width'))));
    expect(widths.every((w) => w >= 1)).toBe(true);
    const legend = (await page.textContent('[data-testid="phase-legend"]')) ?? '';
    for (const word of ['drift', 'diffusion', 'undetermined']) expect(legend).toContain(word);

    // Weight travel: layer lines (blue, orange), grey reference slopes, and the exponent per layer.
    const travel = '[data-testid="travel-chart"] canvas';
    await page.waitForSelector(travel);
    expect(await countColour(page, travel, [0x00, 0x72, 0xb2])).toBeGreaterThan(50);
    expect(await countColour(page, travel, [0xe6, 0x9f, 0x00])).toBeGreaterThan(50);
    expect(await countColour(page, travel, [0x77, 0x77, 0x77], 12)).toBeGreaterThan(50);
    const exps = await page.locator('[data-testid="travel-exponents"] tbody tr').allTextContents();
    expect(exps).toHaveLength(4);
    expect(exps.every((t) => /\d\.\d\d/.test(t))).toBe(true);
    expect(await page.textContent('[data-testid="travel-chart"] .u-legend')).toContain('slope ½');

    // Loss: the training line in black and val_loss (window 9) as a dashed black series with hollow points; no
    // layer colour (vermillion, the fourth layer's, used to mean val_loss here).
    const loss = '[data-testid="loss-chart"] canvas';
    await page.waitForSelector(loss);
    expect(await countColour(page, loss, [0, 0, 0], 30)).toBeGreaterThan(50);
    expect(await countColour(page, loss, [0xd5, 0x5e, 0x00], 30)).toBe(0);
    expect(await page.textContent('[data-testid="loss-chart"] .u-legend')).toContain('val_loss (end of epoch)');

    // Noise scale: drawn, with the sentence comparing it to the batch size and calling it an estimate.
    const noise = '[data-testid="noise-chart"] canvas';
    await page.waitForSelector(noise);
    expect(await countColour(page, noise, [0, 0, 0], 30)).toBeGreaterThan(50);
    const sentence = (await page.textContent('[data-testid="noise-sentence"]')) ?? '';
    expect(sentence).toContain('McCandlish et al. 2018');
    expect(sentence).toContain('batch size of 32');
    expect(sentence).toMatch(/estimate/);

    // Information plane: 7 probe windows per layer so far (0, 2, …, 12), the 2 saturated ones (0, 2) hollow.
    // This run holds only the binned estimate, so the plane falls back to it and says so.
    const info = '[data-testid="info-section"]';
    expect(await page.isVisible(info)).toBe(true);
    expect(await page.getAttribute(info, 'data-estimator')).toBe('binned');
    expect(await page.textContent('[data-testid="plane-sentence"]')).toMatch(/^This run's probe windows hold no pairwise estimate .* the plane shows the binned one\. Binned plug-in estimate/);
    expect(await page.isDisabled('[data-testid="plane-pairwise"]')).toBe(true);
    expect(await page.isChecked('[data-testid="plane-binned"]')).toBe(true);
    expect(await page.locator(`${info} .info-point`).count()).toBe(21);
    expect(await page.locator(`${info} .info-point.saturated`).count()).toBe(6);
    expect(await page.$$eval(`${info} .info-point.saturated`, (cs) => cs.every((c) => c.getAttribute('fill') === '#ffffff'))).toBe(true);
    expect(await page.locator(`${info} g.info-layer`).count()).toBe(3);
    // The saturated windows are the first two: each layer's start is hollow, its end is not.
    expect(await page.locator(`${info} .info-start.saturated`).count()).toBe(3);
    expect(await page.locator(`${info} .info-end:not(.saturated)`).count()).toBe(3);
    expect(await page.textContent(info)).toContain('saturated: says nothing');
    if (SHOTS !== null) await page.screenshot({ path: join(SHOTS, 'run-charts.png'), fullPage: true });

    // Live: a new probe window and a new marker reach every drawing without a reload.
    const inkBefore = await inkPixels(page, travel);
    store.append([
      { type: 'window', window: windows[13]! },
      { type: 'marker', marker: { run: run.id, layer: 'dense_Dense3', kind: 'drift-start', step: 64, detected_step: 112, confidence: 0.8, details: {} } },
    ]);
    await page.locator('[data-testid="run-step"]', { hasText: '112' }).waitFor({ timeout: 5_000 });
    await page.waitForFunction(() => document.querySelectorAll('[data-testid="info-section"] .info-point').length === 24, undefined, { timeout: 5_000 });
    await page.waitForFunction(() => document.querySelector('[data-testid="phase-strip"] g.phase-row[data-layer="dense_Dense3"] rect[data-phase="drift"]') !== null, undefined, { timeout: 5_000 });
    expect(await inkPixels(page, travel)).toBeGreaterThan(0);
    expect(inkBefore).toBeGreaterThan(0);
    expect(errors).toEqual([]);
    await page.close();
  });

  it('draws each layer\'s path in the pairwise estimate, and the binned one when switched with the keyboard', async () => {
    const page = await browser.newPage({ viewport: { width: 1200, height: 900 } });
    const errors: string[] = [];
    page.on('pageerror', (e) => errors.push(String(e)));
    await page.goto(`${server.url}/#/run/${paired.id}?steps=8-80`);
    const info = '[data-testid="info-section"]';
    await page.waitForSelector(`${info}[data-estimator="pairwise"] svg`, { timeout: 10_000 });
    const layers = paired.layers.map((l) => l.name);
    const probeWindows = pairedWindows.filter((w) => w.index % 2 === 0);
    /** Per layer: measured paths, saturated paths, start and end markers, and each marker's (step, x, y, r). */
    const drawn = (layer: string) =>
      page.$eval(`${info} g.info-layer[data-layer="${layer}"]`, (g) => ({
        paths: g.querySelectorAll('path.info-path:not(.saturated)').length,
        saturatedPaths: g.querySelectorAll('path.info-path.saturated').length,
        d: g.querySelector('path.info-path')?.getAttribute('d') ?? null,
        starts: g.querySelectorAll('.info-start').length,
        ends: g.querySelectorAll('.info-end').length,
        points: Array.from(g.querySelectorAll('.info-point')).map((p) => ({
          step: Number(p.getAttribute('data-step')),
          x: Number(p.getAttribute('data-x')),
          y: Number(p.getAttribute('data-y')),
          r: p.tagName === 'circle' ? Number(p.getAttribute('r')) : null,
          saturated: p.classList.contains('saturated'),
          title: p.querySelector('title')?.textContent ?? '',
        })),
      }));
    // Pairwise by default: one measured path per layer, a start and an end each, at the stored values.
    const pairwise = [];
    for (const [j, layer] of layers.entries()) {
      const d = await drawn(layer);
      pairwise.push(d);
      expect(d.paths).toBe(1);
      expect(d.saturatedPaths).toBe(0);
      expect([d.starts, d.ends]).toEqual([1, 1]);
      expect(d.points.map((p) => p.step)).toEqual(probeWindows.map((w) => w.step));
      expect(d.points.map((p) => p.x)).toEqual(probeWindows.map((w) => w.layers[layer]!.mi_input_upper));
      expect(d.points.map((p) => p.y)).toEqual(probeWindows.map((w) => w.layers[layer]!.mi_label_pairwise));
      expect(d.points.every((p) => !p.saturated)).toBe(true);
      // The middle markers (circles) grow with step.
      const radii = d.points.map((p) => p.r).filter((r): r is number => r !== null);
      expect(radii).toHaveLength(3);
      expect(radii[0]!).toBeLessThan(radii[1]!);
      expect(radii[1]!).toBeLessThan(radii[2]!);
      expect(d.points[0]!.title).toContain(`${layer} (start) at step 8: I(X;T) ${formatNumber(probeWindows[0]!.layers[layer]!.mi_input_upper!)} bits`);
      expect(d.points[4]!.title).toContain(`(end) at step 72`);
      expect(d.points[4]!.title).toContain(`σ² ${settingText(0.05 * (j + 1) * 1.4)}`);
    }
    expect(await page.getAttribute('[data-testid="info-chart"] > svg', 'data-estimator')).toBe('pairwise');
    const sentence = (await page.textContent('[data-testid="plane-sentence"]')) ?? '';
    expect(sentence).toContain("Kolchinsky–Tracey pairwise estimate with Gaussian noise σ² = 0.05 to 0.21 across layers and windows (0.2 × the layer's spread");
    expect(sentence).toContain('over 512 probe rows; an estimate of a noise-regularised quantity, capped at log2 512 = 9 bits.');
    expect(await page.textContent(info)).toContain('confirm any decision on held-out data');
    expect(await page.isChecked('[data-testid="plane-pairwise"]')).toBe(true);
    if (SHOTS !== null) await page.locator(info).screenshot({ path: join(SHOTS, 'plane-pairwise.png') });

    // To the linear read-out, then to binned, with the keyboard: the radio group takes the focus and an arrow key
    // moves the choice.
    await page.focus('[data-testid="plane-pairwise"]');
    await page.keyboard.press('ArrowRight');
    await page.waitForSelector(`${info}[data-estimator="linear"]`, { timeout: 5_000 });
    expect(new URL(page.url()).hash).toBe(`#/run/${paired.id}?steps=8-80&plane=linear`);
    for (const layer of layers) {
      const d = await drawn(layer);
      // The noisy I(X;T) across as for pairwise; the linear read-out's bound up.
      expect(d.points.map((p) => p.x)).toEqual(probeWindows.map((w) => w.layers[layer]!.mi_input_upper));
      expect(d.points.map((p) => p.y)).toEqual(probeWindows.map((w) => w.layers[layer]!.mi_label_linear));
    }
    expect(await page.textContent('[data-testid="plane-y-title"]')).toBe('I(T;Y) ≥, bits: linear read-out');
    expect(await page.textContent('[data-testid="plane-sentence"]')).toMatch(/^Up: a lower bound on I\(T;Y\) from a linear read-out/);
    await page.keyboard.press('ArrowRight');
    await page.waitForSelector(`${info}[data-estimator="binned"]`, { timeout: 5_000 });
    expect(new URL(page.url()).hash).toBe(`#/run/${paired.id}?steps=8-80&plane=binned`);
    for (const [j, layer] of layers.entries()) {
      const d = await drawn(layer);
      expect(d.points.map((p) => p.x)).toEqual(probeWindows.map((w) => w.layers[layer]!.mi_input));
      expect([d.starts, d.ends]).toEqual([1, 1]);
      if (j < 2) {
        // The hidden layers' binned estimate is saturated everywhere: hollow grey markers on a dotted grey path.
        expect(d.paths).toBe(0);
        expect(d.saturatedPaths).toBe(1);
        expect(d.points.every((p) => p.saturated)).toBe(true);
      } else {
        expect(d.paths).toBe(1);
        expect(d.d).not.toBe(pairwise[j]!.d);
      }
    }
    expect(await page.textContent('[data-testid="plane-sentence"]')).toContain('Binned plug-in estimate with 30 equal-width bins per unit over 1024 probe rows, capped at log2 1024 = 10 bits');
    if (SHOTS !== null) await page.locator(info).screenshot({ path: join(SHOTS, 'plane-binned.png') });

    // The URL reopens the binned plane; choosing pairwise again takes the estimator out of it.
    const again = await browser.newPage({ viewport: { width: 1200, height: 900 } });
    await again.goto(page.url());
    await again.waitForSelector(`${info}[data-estimator="binned"] svg`, { timeout: 10_000 });
    expect(await again.isChecked('[data-testid="plane-binned"]')).toBe(true);
    await again.click('[data-testid="plane-pairwise"]');
    await again.waitForSelector(`${info}[data-estimator="pairwise"]`, { timeout: 5_000 });
    expect(new URL(again.url()).hash).toBe(`#/run/${paired.id}?steps=8-80`);
    await again.close();
    expect(errors).toEqual([]);
    await page.close();
  });

  it('hides the information plane for a run without probe values', async () => {
    const page = await browser.newPage({ viewport: { width: 1200, height: 900 } });
    await page.goto(`${server.url}/#/run/${bare.id}`);
    await page.locator('[data-testid="run-step"]', { hasText: '48' }).waitFor({ timeout: 10_000 });
    await page.waitForSelector('[data-testid="travel-chart"] canvas');
    expect(await page.isVisible('[data-testid="info-section"]')).toBe(false);
    expect(await page.locator('[data-testid="info-section"] circle').count()).toBe(0);
    // No markers: every row of the strip is undetermined.
    const phases = await page.$$eval('[data-testid="phase-strip"] rect.phase-seg', (rs) => rs.map((r) => r.getAttribute('data-phase')));
    expect(phases).toEqual(['undetermined', 'undetermined', 'undetermined', 'undetermined']);
    await page.close();
  });

  it('says so when the run in the URL does not exist', async () => {
    const page = await browser.newPage();
    await page.goto(`${server.url}/#/run/no-such-run`);
    const message = page.locator('[data-testid="run-error"]');
    await message.waitFor({ timeout: 10_000 });
    expect(await message.textContent()).toContain('No run matches “no-such-run”');
    if (SHOTS !== null) await page.screenshot({ path: join(SHOTS, 'bad-run.png'), fullPage: true });
    await page.close();
  });

  it('passes a token given in the URL to the API and the live stream', async () => {
    const guarded = await startServer({ store, port: 0, pollMs: 50, token: 'e2e-token-123456', onError: () => {} });
    try {
      const page = await browser.newPage();
      await page.goto(`${guarded.url}/?token=e2e-token-123456#/run/${run.id}`);
      await page.locator('[data-testid="run-name"]', { hasText: 'gearbox-e2e' }).waitFor({ timeout: 10_000 });
      await page.goto(`${guarded.url}/?token=e2e-token-123456#/`);
      await page.locator(`tr[data-run="${run.id}"]`).waitFor({ timeout: 10_000 });
      // Without it, the page asks for the token (it used to show the API's refusal and "reconnecting…" for ever),
      // and opens with the one entered.
      const bare = await browser.newPage();
      await bare.goto(`${guarded.url}/#/run/${run.id}`);
      const form = bare.locator('[data-testid="token-form"]');
      await form.waitFor({ timeout: 10_000 });
      expect(await form.textContent()).toContain('This server asks for a token');
      expect(await bare.textContent('[data-testid="connection"]')).toBe('needs a token');
      await bare.fill('[data-testid="token-input"]', 'e2e-token-123456');
      await bare.click('[data-testid="token-form"] button');
      await bare.locator('[data-testid="run-name"]', { hasText: 'gearbox-e2e' }).waitFor({ timeout: 10_000 });
      expect(new URL(bare.url()).searchParams.get('token')).toBe('e2e-token-123456');
      // A wrong token is said to be wrong.
      await bare.goto(`${guarded.url}/?token=wrong-token-0000#/`);
      await bare.locator('[data-testid="token-form"]', { hasText: 'The server refused this token' }).waitFor({ timeout: 10_000 });
      await bare.close();
      await page.close();
    } finally {
      await guarded.close();
    }
  });
});
