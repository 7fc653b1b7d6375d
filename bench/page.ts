/**
 * What the page costs in a real browser (Debian's chromium under playwright-core): the time from
 * navigation to the first drawn charts for a run of 1,000,000 windows (every series 1,000,000 points)
 * against a run of 2,000, and the time to apply one live window with 50 layers on screen against 4
 * layers. Prints tables measured side by side in one run; it asserts nothing.
 *
 *   node --import tsx bench/page.ts            # about 3 minutes, most of it writing the big store
 *   node --import tsx bench/page.ts --quick    # 100,000 windows instead of 1,000,000, about 40 s
 *
 * Tables:
 *  1. Open a run: from `goto` to the moment the SNR, weight travel, loss and noise charts all have ink
 *     (page clock, polled every animation frame), median of 5 fresh pages per run, interleaved: 1,000,000
 *     windows of one layer, 2,000 windows of one layer, and 3,000 windows of 50 layers. Also the
 *     server's backfill alone (the WebSocket answer, timed in the page), and a zoom into 0.1 % of the big
 *     run: from pressing "Show steps" to its windows drawn in detail.
 *  2. One live window: from the page receiving a `window` message to the end of the animation frame that
 *     draws it (decode, columns, every chart's data and redraw), median and 95th percentile over 30
 *     windows, with 50 and with 4 layers on screen.
 * Needs /usr/bin/chromium (apt-get install chromium). The store lives under os.tmpdir() and is deleted.
 */
import { mkdtempSync, rmSync } from 'node:fs';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import { parseArgs } from 'node:util';
import type { Browser, Page } from 'playwright-core';
import type { LayerStats, RunInfo, SinkRecord, WindowRecord } from '../src/protocol/records.js';
import { startServer, type RunningServer } from '../src/server/serve.js';
import { openStore, type SqliteStore } from '../src/storage/sqlite-store.js';
import { CHROMIUM, ensurePageBuilt, haveChromium, launchChromium } from '../test/helpers/browser.js';
import { fakeRun, fakeWindows, windowAt } from '../test/helpers/window-records.js';
import { printTable, progress } from './report.js';

const { values } = parseArgs({ options: { quick: { type: 'boolean', default: false } } });
const BIG = values.quick ? 100_000 : 1_000_000;
const SMALL = 2_000;
const OPENS = 5;
const LIVE_WINDOWS = 30;
const LONG_WIDE = 3_000;

const median = (xs: number[]): number => {
  const s = [...xs].sort((a, b) => a - b);
  return s.length % 2 === 1 ? s[s.length >> 1]! : (s[s.length / 2 - 1]! + s[s.length / 2]!) / 2;
};
const quantile = (xs: number[], q: number): number => [...xs].sort((a, b) => a - b)[Math.min(xs.length - 1, Math.floor(q * xs.length))]!;
const ms = (x: number): string => x.toFixed(0);

/** One layer's statistics at window w of a smooth run: SNR falling through 0 dB, travel growing as √step. */
function lean(w: number, n: number, params: number, noise: () => number): LayerStats {
  const step = (w + 1) * 8;
  const snrDb = 12 - 30 * (w / n) + 2 * noise();
  const snr = 10 ** (snrDb / 20);
  return {
    grad_mean_norm: snr,
    grad_std_norm: 1,
    grad_snr: snr,
    grad_snr_db: snrDb,
    noise_scale: 32 * (1 + w / 50),
    weight_norm: 1 + Math.sqrt(step) / 100,
    weight_travel: Math.sqrt(step) / 50,
    update_ratio: 1e-3,
    nonfinite: 0,
    batches: 8,
    params,
    travel_exponent: w < 3 ? null : 0.5,
  };
}

/** Writes `n` windows of a 1-layer run in chunks, without holding them all. */
function writeBigRun(store: SqliteStore, run: RunInfo, n: number): void {
  let seed = 7;
  const noise = (): number => {
    seed = (seed * 1103515245 + 12345) % 2147483648;
    return seed / 2147483648 - 0.5;
  };
  store.beginRun(run);
  const layer = run.layers[0]!;
  for (let start = 0; start < n; start += 20_000) {
    const chunk: SinkRecord[] = [];
    for (let w = start; w < Math.min(n, start + 20_000); w++) {
      const window = windowAt(run, w, {
        layers: { [layer.name]: lean(w, n, layer.params, noise) },
        network: lean(w, n, layer.params, noise),
        logs: { loss: 1 / Math.sqrt(w + 1) + 0.01 * noise() },
      });
      chunk.push({ type: 'window', window });
    }
    store.append(chunk);
    if (start % 200_000 === 0) progress(`big run: ${start.toLocaleString('en')} of ${n.toLocaleString('en')} windows written`);
  }
}

/**
 * A fresh page. tsx compiles this file keeping function names, which wraps functions in `__name(…)`; the
 * functions handed to the page carry that call, so the page gets a `__name` that does nothing.
 */
async function newPage(browser: Browser): Promise<Page> {
  const page = await browser.newPage({ viewport: { width: 1280, height: 800 } });
  await page.addInitScript({ content: 'globalThis.__name = (f) => f;' });
  return page;
}

async function timeToCharts(browser: Browser, url: string): Promise<{ charts: number; backfill: number }> {
  const page = await newPage(browser);
  // The backfill's arrival, on the page clock: the first 'backfill' message the page's socket receives.
  await page.addInitScript(() => {
    const Native = window.WebSocket;
    window.WebSocket = class extends Native {
      constructor(url: string | URL, protocols?: string | string[]) {
        super(url, protocols);
        this.addEventListener('message', (ev: MessageEvent) => {
          const w = window as unknown as { __backfillAt?: number };
          if (w.__backfillAt === undefined && String(ev.data).startsWith('{"v":1,"type":"backfill"')) w.__backfillAt = performance.now();
        });
      }
    } as typeof WebSocket;
  });
  await page.goto(url);
  const charts = await page.waitForFunction(
    () => {
      const ids = ['snr-chart', 'travel-chart', 'loss-chart', 'noise-chart'];
      const inked = (c: HTMLCanvasElement | null): boolean => {
        if (c === null || c.width === 0) return false;
        const d = c.getContext('2d')!.getImageData(0, 0, c.width, c.height).data;
        for (let i = 0; i < d.length; i += 16) if (d[i + 3]! > 200 && d[i]! + d[i + 1]! + d[i + 2]! < 300) return true;
        return false;
      };
      return ids.every((id) => inked(document.querySelector<HTMLCanvasElement>(`[data-testid="${id}"] canvas`))) ? performance.now() : false;
    },
    undefined,
    { polling: 'raf', timeout: 120_000 },
  );
  const result = { charts: (await charts.jsonValue()) as number, backfill: (await page.evaluate(() => (window as unknown as { __backfillAt: number }).__backfillAt)) };
  await page.close();
  return result;
}

async function zoomDetail(browser: Browser, url: string, from: number, to: number): Promise<number> {
  const page = await newPage(browser);
  await page.goto(url);
  const facts = page.locator('[data-testid="run-facts"]');
  await facts.filter({ hasText: 'drawn' }).waitFor({ timeout: 120_000 });
  await page.waitForSelector('[data-testid="noise-chart"] canvas');
  const before = (await facts.textContent()) ?? '';
  await page.fill('[data-testid="range-from"]', String(from));
  await page.fill('[data-testid="range-to"]', String(to));
  const t0 = await page.evaluate(() => performance.now());
  await page.keyboard.press('Enter');
  const t1 = await page.waitForFunction((b) => (document.querySelector('[data-testid="run-facts"]')!.textContent !== b ? performance.now() : false), before, { polling: 'raf', timeout: 60_000 });
  const t = ((await t1.jsonValue()) as number) - t0;
  await page.close();
  return t;
}

/** Page-side time per live window: from the message to the end of the frame that draws it. */
async function liveWindowCost(browser: Browser, server: RunningServer, store: SqliteStore, run: RunInfo, extra: WindowRecord[]): Promise<{ drawn: number[]; painted: number[] }> {
  const page = await newPage(browser);
  await page.addInitScript(() => {
    const Native = window.WebSocket;
    const costs: number[] = [];
    const painted: number[] = [];
    (window as unknown as { __costs: number[]; __painted: number[] }).__costs = costs;
    (window as unknown as { __painted: number[] }).__painted = painted;
    window.WebSocket = class extends Native {
      override set onmessage(f: ((ev: MessageEvent) => void) | null) {
        super.onmessage =
          f === null
            ? null
            : (ev: MessageEvent) => {
                const isWindow = String(ev.data).startsWith('{"v":1,"type":"window"');
                const t0 = performance.now();
                f(ev);
                // The page draws in the next animation frame; a frame callback queued now runs after its
                // drawing (and the microtasks that finish it) in that same frame.
                // A second frame callback runs once that frame is laid out and painted.
                if (isWindow) {
                  requestAnimationFrame(() => {
                    const drawn = performance.now() - t0;
                    requestAnimationFrame(() => painted.push(performance.now() - t0));
                    costs.push(drawn);
                  });
                }
              };
      }
      override get onmessage(): ((ev: MessageEvent) => void) | null {
        return super.onmessage as ((ev: MessageEvent) => void) | null;
      }
    } as typeof WebSocket;
  });
  await page.goto(`${server.url}/#/run/${run.id}`);
  await page.waitForSelector('[data-testid="noise-chart"] canvas', { timeout: 60_000 });
  for (const w of extra) {
    store.append([{ type: 'window', window: w }]);
    await page.locator('[data-testid="run-step"]', { hasText: String(w.step) }).waitFor({ timeout: 10_000 });
  }
  await page.waitForTimeout(200);
  const drawn = await page.evaluate(() => (window as unknown as { __costs: number[] }).__costs);
  const painted = await page.evaluate(() => (window as unknown as { __painted: number[] }).__painted);
  await page.close();
  return { drawn, painted };
}

async function main(): Promise<void> {
  if (!haveChromium) {
    console.log(`bench/page.ts: skipped, no browser at ${CHROMIUM} (apt-get install chromium).`);
    return;
  }
  ensurePageBuilt();
  const dir = mkdtempSync(join(tmpdir(), 'tidemark-page-bench-'));
  const store = openStore(join(dir, 'runs.db'));
  let server: RunningServer | null = null;
  let browser: Browser | null = null;
  try {
    const big = fakeRun({ id: 'bench-big-run', name: 'big', layers: 1 });
    const small = fakeRun({ id: 'bench-small-run', name: 'small', layers: 1 });
    const t0 = performance.now();
    writeBigRun(store, big, BIG);
    const writeS = (performance.now() - t0) / 1000;
    writeBigRun(store, small, SMALL);
    const points = store.seriesKeys(big.id).length;
    progress(`big run written in ${writeS.toFixed(0)} s (${points} series of ${BIG.toLocaleString('en')} points)`);

    const wide = fakeRun({ id: 'bench-wide-run', name: 'fifty layers', layers: 50 });
    const narrow = fakeRun({ id: 'bench-narrow-run', name: 'four layers', layers: 4 });
    const wideWs = fakeWindows(wide, 200 + LIVE_WINDOWS, 3, false);
    const narrowWs = fakeWindows(narrow, 200 + LIVE_WINDOWS, 3, false);
    for (const [r, ws] of [
      [wide, wideWs],
      [narrow, narrowWs],
    ] as const) {
      store.beginRun(r);
      store.append(ws.slice(0, 200).map((window): SinkRecord => ({ type: 'window', window })));
    }

    // A long run of a wide model: every window carries 50 layers (with their kernel and bias statistics).
    const long = fakeRun({ id: 'bench-long-wide-run', name: 'fifty layers, long', layers: 50 });
    store.beginRun(long);
    const longWs = fakeWindows(long, LONG_WIDE, 4, false);
    for (let i = 0; i < longWs.length; i += 250) store.append(longWs.slice(i, i + 250).map((window): SinkRecord => ({ type: 'window', window })));
    progress(`long 50-layer run written (${LONG_WIDE} windows)`);

    server = await startServer({ store, port: 0, pollMs: 20, onError: () => {} });
    browser = await launchChromium();

    const opens: Record<'big' | 'small' | 'wide', { charts: number[]; backfill: number[] }> = {
      big: { charts: [], backfill: [] },
      small: { charts: [], backfill: [] },
      wide: { charts: [], backfill: [] },
    };
    const openOrder = [
      ['big', big],
      ['small', small],
      ['wide', long],
    ] as const;
    // A first open of each warms the browser's and the server's caches; it is not counted.
    for (const [, run] of openOrder) await timeToCharts(browser, `${server.url}/#/run/${run.id}`);
    for (let i = 0; i < OPENS; i++) {
      for (const [key, run] of openOrder) {
        const t = await timeToCharts(browser, `${server.url}/#/run/${run.id}`);
        opens[key].charts.push(t.charts);
        opens[key].backfill.push(t.backfill);
      }
      progress(`open ${i + 1} of ${OPENS}`);
    }
    const bigSteps = BIG * 8;
    const zoomFrom = Math.round(bigSteps * 0.5);
    const zoomTo = Math.round(zoomFrom + bigSteps * 0.001);
    const zoom = await zoomDetail(browser, `${server.url}/#/run/${big.id}`, zoomFrom, zoomTo);

    const cBig = median(opens.big.charts);
    const cSmall = median(opens.small.charts);
    printTable(
      `Table 1. Opening a run in the page (chromium, 1280×800, median of ${OPENS} fresh pages each, interleaved)`,
      ['run', 'windows (points per series)', 'backfill received, ms', 'all 4 charts drawn, ms', 'ratio to small'],
      [
        ['big', BIG.toLocaleString('en'), ms(median(opens.big.backfill)), ms(cBig), (cBig / cSmall).toFixed(2)],
        ['small', SMALL.toLocaleString('en'), ms(median(opens.small.backfill)), ms(cSmall), '1.00'],
        ['50 layers', LONG_WIDE.toLocaleString('en'), ms(median(opens.wide.backfill)), ms(median(opens.wide.charts)), (median(opens.wide.charts) / cSmall).toFixed(2)],
      ],
      [
        'Times on the page clock from navigation start. The 1-layer runs open from 2,000 windows, the 50-layer run from 490 (the page',
        'asks a wide model for fewer, and for none of the per-variable statistics); windows are thinned evenly, first and last kept;',
        `the big run's store holds ${points} series of ${BIG.toLocaleString('en')} points (written in ${writeS.toFixed(0)} s).`,
        `Zoom into steps ${zoomFrom.toLocaleString('en')}–${zoomTo.toLocaleString('en')} of the big run (0.1 % of it): detail fetched and drawn in ${ms(zoom)} ms.`,
      ],
    );

    const rows: string[][] = [];
    const costs: Record<string, { drawn: number[]; painted: number[] }> = {};
    for (const [label, run, ws] of [
      ['50 layers', wide, wideWs],
      ['4 layers', narrow, narrowWs],
    ] as const) {
      costs[label] = await liveWindowCost(browser, server, store, run, ws.slice(200));
      progress(`live windows with ${label}: ${costs[label].drawn.length} measured`);
    }
    const base = costs['4 layers']!;
    for (const label of ['50 layers', '4 layers']) {
      const c = costs[label]!;
      rows.push([
        label,
        String(c.drawn.length),
        median(c.drawn).toFixed(1),
        quantile(c.drawn, 0.95).toFixed(1),
        median(c.painted).toFixed(1),
        quantile(c.painted, 0.95).toFixed(1),
        (median(c.painted) / median(base.painted)).toFixed(2),
      ]);
    }
    printTable(
      'Table 2. Applying one live window in the page (200 windows already drawn, chromium, 1280×800)',
      ['layers on screen', 'windows', 'drawn, median ms', 'p95', 'painted, median ms', 'p95', 'painted, ratio to 4 layers'],
      rows,
      [
        'Page-side times from the window message. Drawn: to the end of the animation frame that draws it (decoding, chart columns, every',
        'chart redrawn, the phase strip, the tables), including the wait for that frame (up to about 17 ms at 60 frames a second).',
        'Painted: to the start of the next frame, so the layout and paint of the drawn frame are in.',
      ],
    );
  } finally {
    await browser?.close();
    await server?.close();
    store.close();
    rmSync(dir, { recursive: true, force: true });
  }
}

await main();
