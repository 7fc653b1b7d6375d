/**
 * The server under a sustained load: 8 remote writers (RemoteSink, one run each) at 1,000 points a second
 * each, and 50 live viewers spread over those runs (5 of them also following the runs list), for 60 s.
 * The server runs as a child process (`tidemark serve`) so its resident memory can be read from
 * /proc/<pid>/status while the load runs.
 *
 * Checked at the end: every window of every writer is stored exactly once and equal to what was written;
 * every viewer got every window of its run exactly once and in order (backfill, then live; a `gap` is
 * allowed only if the missing windows then come over HTTP); the runs-list viewers saw every run finish;
 * no sink dropped or reported anything; the server wrote nothing to stderr; its RSS stayed under
 * RSS_LIMIT_MB and did not keep growing.
 *
 * TIDEMARK_LOAD_SECONDS shortens the load for a local run; the default (and CI) is 60.
 */
import { mkdtempSync, rmSync } from 'node:fs';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import { describe, expect, it } from 'vitest';
import WebSocket from 'ws';
import type { LiveMessage, RunSummary } from '../../src/protocol/messages.js';
import type { RunInfo, WindowRecord } from '../../src/protocol/records.js';
import { RemoteSink } from '../../src/storage/remote-sink.js';
import { decodeJson, encodeJson } from '../../src/storage/sink.js';
import { openStore } from '../../src/storage/sqlite-store.js';
import { windowPoints } from '../../src/protocol/points.js';
import { freePort, rssMb, startServerChild } from '../helpers/server-child.js';
import { fakeRun, fakeWindows } from '../helpers/window-records.js';

const SECONDS = Number(process.env.TIDEMARK_LOAD_SECONDS ?? 60);
const WRITERS = 8;
const VIEWERS = 50;
/** Viewers 0..RUNS_LIST_VIEWERS-1 also follow the runs list. */
const RUNS_LIST_VIEWERS = 5;
const POINTS_PER_SECOND = 1000;
const LAYERS = 4;
/** Resident memory of the server may never pass this. */
const RSS_LIMIT_MB = 256;
/** The last third's highest RSS may exceed the first third's by at most this factor plus RSS_SLACK_MB. */
const RSS_GROWTH = 1.15;
const RSS_SLACK_MB = 16;
const RSS_EVERY_MS = 2000;





const sleep = (ms: number): Promise<void> => new Promise((r) => setTimeout(r, ms));

function quantile(sorted: readonly number[], q: number): number {
  if (sorted.length === 0) return Number.NaN;
  return sorted[Math.min(sorted.length - 1, Math.floor(q * sorted.length))]!;
}

interface Writer {
  run: RunInfo;
  windows: WindowRecord[];
  sink: RemoteSink;
  reports: string[];
  /** Windows written (a prefix of `windows`), and when each was handed to the sink (performance.now()). */
  sent: number;
  sentAt: number[];
  points: number;
}

interface Viewer {
  ws: WebSocket;
  run: string;
  runsList: boolean;
  backfill: WindowRecord[] | null;
  live: WindowRecord[];
  /** performance.now() at receipt of each live window. */
  liveAt: number[];
  gaps: (number | null)[];
  errors: string[];
  rows: Map<string, RunSummary>;
}

async function openViewer(base: string, run: string, runsList: boolean): Promise<Viewer> {
  const ws = new WebSocket(`${base}/live`);
  const v: Viewer = { ws, run, runsList, backfill: null, live: [], liveAt: [], gaps: [], errors: [], rows: new Map() };
  ws.on('message', (data) => {
    const at = performance.now();
    const m = decodeJson(String(data)) as LiveMessage;
    if (m.type === 'backfill') {
      if (m.run.id === run) v.backfill = m.windows;
    } else if (m.type === 'window') {
      if (m.window.run !== run) v.errors.push(`window of another run ${m.window.run}`);
      v.live.push(m.window);
      v.liveAt.push(at);
    } else if (m.type === 'gap') {
      v.gaps.push(m.after_step);
    } else if (m.type === 'runs') {
      for (const r of m.runs) v.rows.set(r.id, r);
    } else if (m.type === 'error') {
      v.errors.push(`${m.code}: ${m.message}`);
    }
  });
  await new Promise<void>((resolve, reject) => {
    ws.once('open', () => resolve());
    ws.once('error', reject);
  });
  if (runsList) ws.send(encodeJson({ v: 1, type: 'subscribe-runs' }));
  // points: the most the protocol allows, so the backfill is never thinned.
  ws.send(encodeJson({ v: 1, type: 'subscribe', run, points: 100_000 }));
  return v;
}

describe('load: 8 remote writers and 50 live viewers', () => {
  it(`stores and streams every window exactly once for ${SECONDS} s with bounded server memory`, async () => {
    expect(Number.isFinite(SECONDS) && SECONDS > 0).toBe(true);
    const dir = mkdtempSync(join(tmpdir(), 'tidemark-load-'));
    const serverErr: string[] = [];
    const port = await freePort();
    const child = await startServerChild(join(dir, 'load.db'), { port, stderr: serverErr });
    const pid = child.pid;
    const base = `http://127.0.0.1:${port}`;
    const viewers: Viewer[] = [];
    const writers: Writer[] = [];
    const rss: { at: number; mb: number }[] = [];
    let sampler: NodeJS.Timeout | undefined;
    try {
      const rssStart = rssMb(pid);

      // Enough windows for the whole load even if every window had the fewest points.
      const perWindowMin = windowPoints(fakeWindows(fakeRun({ id: 'probe', layers: LAYERS }), 20).reduce((a, b) => (windowPoints(a) <= windowPoints(b) ? a : b)));
      const maxWindows = Math.ceil((SECONDS * POINTS_PER_SECOND) / perWindowMin) + 10;
      for (let i = 0; i < WRITERS; i++) {
        const run = fakeRun({ id: `load-run-${i}`, name: `load ${i}`, layers: LAYERS, started_at: Date.now() });
        const reports: string[] = [];
        const sink = new RemoteSink({
          url: `ws://127.0.0.1:${port}`,
          closeTimeoutMs: 20_000,
          onError: (e) => reports.push(`${(e as { code?: string }).code} ${(e as Error).message}`),
        });
        writers.push({ run, windows: fakeWindows(run, maxWindows, 100 + i), sink, reports, sent: 0, sentAt: [], points: 0 });
        await sink.open(run);
      }
      // Viewers subscribe to existing runs: wait until batch 0 of every writer is stored.
      for (let t = Date.now(); ; ) {
        const runs = (await (await fetch(`${base}/api/runs`)).json()) as { id: string }[];
        if (runs.length === WRITERS) break;
        if (Date.now() - t > 10_000) throw new Error(`only ${runs.length} runs stored after 10 s`);
        await sleep(50);
      }

      sampler = setInterval(() => rss.push({ at: performance.now(), mb: rssMb(pid) }), RSS_EVERY_MS);
      const t0 = performance.now();
      const end = t0 + SECONDS * 1000;
      // Each writer sends a window whenever its points so far fall behind 1,000 a second (staggered starts),
      // and flushes after each window as the monitor does.
      const pace = async (w: Writer, offsetMs: number): Promise<void> => {
        const start = t0 + offsetMs;
        while (w.sent < w.windows.length) {
          const due = start + (w.points / POINTS_PER_SECOND) * 1000;
          if (due >= end) break;
          const wait = due - performance.now();
          if (wait > 0) await sleep(wait);
          const window = w.windows[w.sent]!;
          w.sentAt.push(performance.now());
          w.sink.write({ type: 'window', window });
          await w.sink.flush();
          w.sent++;
          w.points += windowPoints(window);
        }
      };
      const pacing = writers.map((w, i) => pace(w, (i * 100) / WRITERS));
      // Viewers join while the windows flow (over the first 2.5 s), so backfill and live stream meet.
      for (let i = 0; i < VIEWERS; i++) {
        viewers.push(await openViewer(base.replace('http', 'ws'), writers[i % WRITERS]!.run.id, i < RUNS_LIST_VIEWERS));
        await sleep(50);
      }
      await Promise.all(pacing);
      const tWritten = performance.now();
      clearInterval(sampler);
      sampler = undefined;
      for (const w of writers) {
        const last = w.windows[w.sent - 1]!;
        w.sink.write({ type: 'end', run: w.run.id, status: 'finished', step: last.step, time: Date.now() });
      }
      await Promise.all(writers.map((w) => w.sink.close()));
      const tClosed = performance.now();

      // Wait for the last windows and run rows to reach the viewers.
      const complete = (v: Viewer): boolean => {
        const w = writers.find((x) => x.run.id === v.run)!;
        const got = (v.backfill?.length ?? 0) + v.live.length;
        const rowsDone = !v.runsList || writers.every((x) => v.rows.get(x.run.id)?.status === 'finished' && v.rows.get(x.run.id)?.windows === x.sent);
        return (got >= w.sent || v.gaps.length > 0) && rowsDone;
      };
      for (let t = Date.now(); Date.now() - t < 15_000 && !viewers.every(complete); ) await sleep(100);
      const rssEnd = rssMb(pid);

      // --- Writers: nothing dropped or reported.
      for (const w of writers) {
        expect(w.reports, w.run.id).toEqual([]);
        expect(w.sink.dropped, w.run.id).toBe(0);
        expect(w.sink.unacknowledged, w.run.id).toBe(0);
        expect(w.sent, w.run.id).toBeLessThan(w.windows.length);
      }

      // --- Viewers: every window of its run exactly once, in order, equal to the stored one.
      let gapsFilled = 0;
      let gaps = 0;
      let backfilled = 0;
      const latencies: number[] = [];
      const storedJson = new Map<string, string[]>();
      {
        const store = openStore(join(dir, 'load.db'), { readonly: true });
        try {
          for (const w of writers) storedJson.set(w.run.id, store.windows(w.run.id).map((x) => encodeJson(x)));
        } finally {
          store.close();
        }
      }
      for (const [i, v] of viewers.entries()) {
        const w = writers.find((x) => x.run.id === v.run)!;
        expect(v.errors, `viewer ${i}`).toEqual([]);
        expect(v.backfill, `viewer ${i} backfill`).not.toBeNull();
        backfilled += v.backfill!.length;
        const seq = [...v.backfill!, ...v.live];
        const indexes = seq.map((x) => x.index);
        // Strictly increasing: in order, never twice.
        expect(indexes.every((x, k) => k === 0 || x > indexes[k - 1]!), `viewer ${i} order`).toBe(true);
        const got = new Map(seq.map((x) => [x.index, x]));
        gaps += v.gaps.length;
        for (const after of v.gaps) {
          const r = await fetch(`${base}/api/runs/${v.run}/windows${after === null ? '' : `?after=${after}`}`);
          expect(r.status).toBe(200);
          for (const x of decodeJson(await r.text()) as WindowRecord[]) {
            if (!got.has(x.index)) {
              got.set(x.index, x);
              gapsFilled++;
            }
          }
        }
        expect(got.size, `viewer ${i} windows`).toBe(w.sent);
        const stored = storedJson.get(v.run)!;
        for (let k = 0; k < w.sent; k++) {
          const x = got.get(k);
          expect(x === undefined ? `missing window ${k}` : encodeJson(x), `viewer ${i} window ${k}`).toBe(stored[k]);
        }
        v.live.forEach((x, k) => latencies.push(v.liveAt[k]! - w.sentAt[x.index]!));
        if (v.runsList) {
          for (const x of writers) {
            expect(v.rows.get(x.run.id), `viewer ${i} row ${x.run.id}`).toMatchObject({ status: 'finished', windows: x.sent, last_step: x.windows[x.sent - 1]!.step });
          }
        }
      }
      for (const v of viewers) v.ws.close();

      // --- The store (read after the server stopped): every window exactly once, equal to what was written.
      await child.stop();
      const store = openStore(join(dir, 'load.db'), { readonly: true });
      let windowsStored = 0;
      let pointsStored = 0;
      try {
        for (const w of writers) {
          const stored = store.windows(w.run.id);
          expect(stored.length, w.run.id).toBe(w.sent);
          expect(new Set(stored.map((x) => x.index)).size, w.run.id).toBe(stored.length);
          expect(stored, w.run.id).toEqual(w.windows.slice(0, w.sent));
          windowsStored += stored.length;
          pointsStored += stored.reduce((s, x) => s + windowPoints(x), 0);
        }
        expect(store.runs().map((r) => [r.id, r.status, r.windows]).sort()).toEqual(writers.map((w) => [w.run.id, 'finished', w.sent]).sort());
      } finally {
        store.close();
      }
      expect(serverErr.join('')).toBe('');

      // --- Load actually offered, and memory.
      const pointsPerSecond = pointsStored / ((tWritten - t0) / 1000);
      // The test must have applied real load to mean anything; half the planned rate leaves room for a slow
      // machine (the rate itself is the bench's business, bench/server.ts).
      expect(pointsPerSecond).toBeGreaterThan(WRITERS * POINTS_PER_SECOND * 0.5);
      expect(rss.length).toBeGreaterThanOrEqual(3);
      const third = Math.max(1, Math.floor(rss.length / 3));
      const firstMax = Math.max(...rss.slice(0, third).map((s) => s.mb));
      const lastMax = Math.max(...rss.slice(-third).map((s) => s.mb));
      const maxMb = Math.max(rssStart, rssEnd, ...rss.map((s) => s.mb));
      latencies.sort((a, b) => a - b);
      console.log(
        `load test: ${SECONDS} s, ${WRITERS} writers, ${VIEWERS} viewers: ${Math.round(pointsPerSecond)} points/s stored ` +
          `(${Math.round(pointsPerSecond / WRITERS)} per writer), ${windowsStored} windows, ${latencies.length} live + ${backfilled} backfill deliveries, ` +
          `${gaps} gaps (${gapsFilled} windows fetched over HTTP); server RSS MiB start ${rssStart.toFixed(0)}, ` +
          `first-third max ${firstMax.toFixed(0)}, last-third max ${lastMax.toFixed(0)}, max ${maxMb.toFixed(0)}, end ${rssEnd.toFixed(0)} ` +
          `(${rss.length} samples); written→viewer latency ms p50 ${quantile(latencies, 0.5).toFixed(1)} p99 ${quantile(latencies, 0.99).toFixed(1)} ` +
          `max ${quantile(latencies, 1).toFixed(1)}; sinks closed ${(tClosed - tWritten).toFixed(0)} ms after the last window`,
      );
      expect(maxMb).toBeLessThan(RSS_LIMIT_MB);
      expect(lastMax).toBeLessThanOrEqual(firstMax * RSS_GROWTH + RSS_SLACK_MB);
    } finally {
      if (sampler !== undefined) clearInterval(sampler);
      for (const v of viewers) v.ws.terminate();
      await Promise.all(writers.map((w) => w.sink.close()));
      if (child.proc.exitCode === null && child.proc.signalCode === null) {
        const exited = new Promise((r) => child.proc.once('exit', r));
        child.proc.kill('SIGKILL');
        await exited;
      }
      rmSync(dir, { recursive: true, force: true });
    }
  }, 150_000);
});
