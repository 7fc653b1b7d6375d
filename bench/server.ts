/**
 * What the server costs: remote ingest against direct store writes, the delay from stored to viewer, and
 * the server's memory under load. The server runs as a child process (`tidemark serve`) on loopback;
 * writers, viewers and the direct store live in this process. Prints tables measured side by side in one
 * run; it asserts nothing.
 *
 *   node --import tsx bench/server.ts            # about 4½ minutes on a shared 2-core machine
 *   node --import tsx bench/server.ts --quick    # about 75 s, smaller figures and noisier
 *
 * Tables:
 *  1. Ingest: points/s stored through WebSocket (RemoteSink → server → SQLite) against Store.appendBatch
 *     of the same records, in the same batches, into a SQLite file in this process; interleaved rounds.
 *  2. Live latency: 1, 20 and 100 viewers follow one run while a writer sends 20 windows a second; the
 *     delay from the writer receiving the ack of a window's batch to each viewer receiving the window.
 *  3. Server memory (VmRSS of the child) while 8 writers send 1,000 points a second each, without and
 *     with 50 viewers.
 * Every file lives in a temporary directory under os.tmpdir() and is deleted at the end.
 */
import { quickFlag } from './quick-flag.js';
import { mkdtempSync, rmSync } from 'node:fs';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import WebSocket from 'ws';
import { AckingWriter } from './acking-writer.js';
import type { RunInfo, WindowRecord } from '../src/protocol/records.js';
import { RemoteSink } from '../src/storage/remote-sink.js';
import { encodeJson } from '../src/storage/sink.js';
import { openStore } from '../src/storage/sqlite-store.js';
import type { Store } from '../src/storage/store.js';
import { benchRun, benchWindows, LAYERS, windowRecords } from './bench-runs.js';
import { fmtInt, fmtMs, fmtRatio, median, printTable, progress, quantile } from './report.js';
import { windowPoints } from '../src/protocol/points.js';
import { freePort, rssMb, startServerChild, type ServerChild } from '../test/helpers/server-child.js';

const USAGE = `usage: node --import tsx bench/server.ts [--quick]
  --quick   fewer windows, rounds and seconds (tables keep their shape; figures are noisier)`;

interface Settings {
  quick: boolean;
  /** Table 1: windows per measurement, and interleaved rounds. */
  ingestWindows: number;
  rounds: number;
  /** Table 2: seconds of windows at 20 a second per viewer count. */
  latencySeconds: number;
  /** Table 3: seconds of load per row. */
  memorySeconds: number;
}

function readSettings(): Settings | null {
  const q = quickFlag(USAGE);
  if (q === null) return null;
  return { quick: q, ingestWindows: q ? 500 : 2000, rounds: q ? 2 : 3, latencySeconds: q ? 5 : 15, memorySeconds: q ? 10 : 30 };
}

// ---------------------------------------------------------------------------------------------
// Records: a model of 10 dense layers (kernel + bias), windows of 8 minibatches (test/helpers/window-records.ts).




// ---------------------------------------------------------------------------------------------
// Helpers



const sleep = (ms: number): Promise<void> => new Promise((r) => setTimeout(r, ms));

type Child = ServerChild;

/** `tidemark serve` in a child process, on a free loopback port. */
async function serverChild(db: string, args: string[] = []): Promise<Child> {
  return startServerChild(db, { port: await freePort(), args });
}

async function metric(child: Child, name: string): Promise<number> {
  const text = await (await fetch(`${child.http}/metrics`)).text();
  const m = new RegExp(`^${name}(?:_total)? (\\S+)$`, 'm').exec(text);
  return m === null ? Number.NaN : Number(m[1]);
}

function collectErrors(into: string[]): (e: unknown) => void {
  return (e) => into.push(`${(e as { code?: string }).code ?? '?'} ${(e as Error).message}`);
}

// ---------------------------------------------------------------------------------------------
// Table 1: ingest through WebSocket against direct appendBatch

/** Direct: the same batches through Store.appendBatch, one transaction each. Returns ms for the window batches. */
function directIngest(store: Store, run: RunInfo, windows: readonly WindowRecord[], perBatch: number): number {
  store.appendBatch(run.id, 0, [{ type: 'run', run }]);
  const records = windowRecords(windows);
  const t0 = performance.now();
  let seq = 1;
  for (let i = 0; i < records.length; i += perBatch) store.appendBatch(run.id, seq++, records.slice(i, i + perBatch));
  return performance.now() - t0;
}

/** Through the server: a RemoteSink cutting batches of `perBatch` windows; until every batch is acknowledged. */
async function remoteIngest(child: Child, run: RunInfo, windows: readonly WindowRecord[], perBatch: number, errors: string[]): Promise<{ ms: number; dropped: number }> {
  const sink = new RemoteSink({ url: child.ws, maxBatchRecords: perBatch, maxMemoryBytes: 1024 * 1024 * 1024, closeTimeoutMs: 120_000, onError: collectErrors(errors) });
  await sink.open(run);
  // Batch 0 (the run) first, untimed, as the direct path's beginning is.
  while (sink.unacknowledged > 0) await sleep(5);
  const t0 = performance.now();
  for (const window of windows) sink.write({ type: 'window', window });
  await sink.flush();
  await sink.close();
  return { ms: performance.now() - t0, dropped: sink.dropped };
}

async function ingestTable(dir: string, s: Settings): Promise<void> {
  // Table 1 measures the write path, not the per-connection rate limit (200 batches/s by default).
  const child = await serverChild(join(dir, 'ingest-remote.db'), ['--ingest-rate', '1000000']);
  const direct = openStore(join(dir, 'ingest-direct.db'));
  const errors: string[] = [];
  let dropped = 0;
  let remotePoints = 0;
  const sizes = [1, 10, 100];
  const rows: string[][] = [];
  try {
    // Warm-up: both paths once, untimed.
    {
      const run = benchRun('warm-remote');
      await remoteIngest(child, run, benchWindows(run, 100, 99), 10, errors);
      const dRun = benchRun('warm-direct');
      directIngest(direct, dRun, benchWindows(dRun, 100, 99), 10);
    }
    const before = await metric(child, 'tidemark_points_ingested');
    for (const perBatch of sizes) {
      const remoteRates: number[] = [];
      const directRates: number[] = [];
      const ratios: number[] = [];
      let points = 0;
      for (let r = 0; r < s.rounds; r++) {
        progress(`ingest: ${perBatch} window(s) per batch, round ${r + 1}/${s.rounds}`);
        const rRun = benchRun(`remote-${perBatch}-${r}`);
        const dRun = benchRun(`direct-${perBatch}-${r}`);
        // The same values for both paths (only the run id differs).
        const rWin = benchWindows(rRun, s.ingestWindows, 1000 + r);
        const dWin = benchWindows(dRun, s.ingestWindows, 1000 + r);
        points = rWin.reduce((a, w) => a + windowPoints(w), 0);
        let remoteMs = 0;
        let directMs = 0;
        const doRemote = async (): Promise<void> => {
          const out = await remoteIngest(child, rRun, rWin, perBatch, errors);
          remoteMs = out.ms;
          dropped += out.dropped;
        };
        const doDirect = (): void => {
          directMs = directIngest(direct, dRun, dWin, perBatch);
        };
        // Alternate the order between rounds.
        if (r % 2 === 0) {
          doDirect();
          await doRemote();
        } else {
          await doRemote();
          doDirect();
        }
        remotePoints += points;
        const remoteRate = points / (remoteMs / 1000);
        const directRate = points / (directMs / 1000);
        remoteRates.push(remoteRate);
        directRates.push(directRate);
        ratios.push(remoteRate / directRate);
      }
      const batches = Math.ceil(s.ingestWindows / perBatch);
      rows.push([
        `${perBatch} window${perBatch === 1 ? '' : 's'} per batch (${fmtInt(batches)} batches)`,
        fmtInt(points),
        fmtInt(median(remoteRates)),
        fmtInt(median(directRates)),
        fmtRatio(median(ratios)),
        `${fmtRatio(Math.min(...ratios))}–${fmtRatio(Math.max(...ratios))}`,
        median(ratios) >= 0.5 ? 'PASS' : 'OVER',
      ]);
    }
    const counted = (await metric(child, 'tidemark_points_ingested')) - before;
    printTable(
      `Table 1. Ingest: points/s stored, WebSocket (RemoteSink → server child → SQLite) vs Store.appendBatch in this process (${s.rounds} rounds, median)`,
      ['batches', 'points', 'WebSocket pts/s', 'direct pts/s', 'ratio', 'range', '≥ 0.5'],
      rows,
      [
        `${s.ingestWindows} windows of a ${LAYERS}-layer model (kernel + bias each) per measurement, ${fmtInt(rows.length ? remotePoints / (sizes.length * s.rounds) / s.ingestWindows : 0)} points per window; a fresh run each time, both files grow alike.`,
        'WebSocket: from the first write to close() resolving with every batch acknowledged (encoding, sending, validating, storing, acking).',
        'Direct: Store.appendBatch of the same batches, one transaction each, into a file opened with the same defaults.',
        'The server ran with --ingest-rate 1000000: the default limit (200 batches/s per connection) would cap 1 window per batch at 200 windows/s.',
        `Server-counted points during the timed rounds: ${fmtInt(counted)} (written: ${fmtInt(remotePoints)}); sink reports: ${errors.length}, records dropped: ${dropped}.`,
      ],
    );
  } finally {
    direct.close();
    await child.stop();
  }
}

// ---------------------------------------------------------------------------------------------
// Table 2: live latency, stored → viewer


interface LatencyViewer {
  ws: WebSocket;
  backfilled: boolean;
  /** Window index → receipt time. */
  got: Map<number, number>;
  duplicates: number;
  gaps: number;
}

async function openLatencyViewer(url: string, runId: string): Promise<LatencyViewer> {
  const ws = new WebSocket(`${url}/live`);
  const v: LatencyViewer = { ws, backfilled: false, got: new Map(), duplicates: 0, gaps: 0 };
  ws.on('message', (data) => {
    const at = performance.now();
    const m = JSON.parse(String(data)) as { type: string; window?: { index: number } };
    if (m.type === 'window' && m.window !== undefined) {
      if (v.got.has(m.window.index)) v.duplicates++;
      else v.got.set(m.window.index, at);
    } else if (m.type === 'backfill') v.backfilled = true;
    else if (m.type === 'gap') v.gaps++;
  });
  await new Promise<void>((resolve, reject) => {
    ws.once('open', () => resolve());
    ws.once('error', reject);
  });
  ws.send(encodeJson({ v: 1, type: 'subscribe', run: runId }));
  return v;
}

async function latencyTable(dir: string, s: Settings): Promise<void> {
  const child = await serverChild(join(dir, 'latency.db'));
  const rows: string[][] = [];
  const perSecond = 20;
  const count = s.latencySeconds * perSecond;
  try {
    for (const viewers of [1, 20, 100]) {
      progress(`live latency: ${viewers} viewer(s), ${count} windows at ${perSecond}/s`);
      const run = benchRun(`latency-${viewers}`);
      const windows = benchWindows(run, count, 7);
      const writer = await AckingWriter.open(child.ws, run);
      const vs: LatencyViewer[] = [];
      for (let i = 0; i < viewers; i++) vs.push(await openLatencyViewer(child.ws, run.id));
      for (let t = Date.now(); Date.now() - t < 10_000 && !vs.every((v) => v.backfilled); ) await sleep(10);
      const t0 = performance.now();
      for (const [i, window] of windows.entries()) {
        const wait = t0 + (i * 1000) / perSecond - performance.now();
        if (wait > 0) await sleep(wait);
        writer.send(i + 1, [{ type: 'window', window }]);
      }
      // Let the last windows arrive.
      for (let t = Date.now(); Date.now() - t < 5000 && !vs.every((v) => v.got.size === count); ) await sleep(10);
      const afterAck: number[] = [];
      const afterSend: number[] = [];
      const ackRtt: number[] = [];
      for (let i = 0; i < count; i++) {
        const sent = writer.sentAt.get(i + 1)!;
        const ack = writer.ackAt.get(i + 1);
        if (ack !== undefined) ackRtt.push(ack - sent);
        for (const v of vs) {
          const at = v.got.get(i);
          if (at === undefined) continue;
          if (ack !== undefined) afterAck.push(at - ack);
          afterSend.push(at - sent);
        }
      }
      afterAck.sort((a, b) => a - b);
      afterSend.sort((a, b) => a - b);
      ackRtt.sort((a, b) => a - b);
      const p99 = quantile(afterAck, 0.99);
      const delivered = vs.reduce((a, v) => a + v.got.size, 0);
      const problems = vs.reduce((a, v) => a + v.duplicates + v.gaps, 0) + writer.errors.length;
      rows.push([
        String(viewers),
        `${fmtInt(delivered)}/${fmtInt(count * viewers)}`,
        fmtMs(quantile(afterAck, 0.5)),
        fmtMs(p99),
        fmtMs(quantile(afterAck, 1)),
        fmtMs(quantile(afterSend, 0.5)),
        fmtMs(quantile(afterSend, 0.99)),
        fmtMs(quantile(ackRtt, 0.5)),
        String(problems),
        viewers === 20 ? (p99 <= 100 ? 'PASS' : 'OVER') : '',
      ]);
      for (const v of vs) v.ws.terminate();
      writer.close();
    }
    printTable(
      `Table 2. Live latency: a window's batch acknowledged to the writer → the window at a viewer (${count} windows at ${perSecond}/s, one window per batch)`,
      ['viewers', 'delivered', 'ack→view p50 ms', 'p99', 'max', 'send→view p50', 'p99', 'send→ack p50', 'dup+gap+err', 'p99 ≤ 100 @ 20'],
      rows,
      [
        `Windows of a ${LAYERS}-layer model, one per batch, from a bare /ingest client (it notes each ack's arrival). Writer and viewers share this process and its clock.`,
        'The server acks a batch once it is stored, then looks for new windows of followed runs in the next turn of its event loop and sends them.',
        'Viewers are served one after another and read by one event loop here, so a large viewer count adds the time to handle the others.',
      ],
    );
  } finally {
    await child.stop();
  }
}

// ---------------------------------------------------------------------------------------------
// Table 3: server memory under 8 writers at 1,000 points/s each

async function memoryRow(dir: string, s: Settings, viewerCount: number): Promise<string[]> {
  const child = await serverChild(join(dir, `memory-${viewerCount}.db`));
  const writers = 8;
  const rate = 1000;
  const errors: string[] = [];
  try {
    await sleep(1000);
    const start = rssMb(child.pid);
    const runs: { run: RunInfo; windows: WindowRecord[]; sink: RemoteSink; sent: number; points: number }[] = [];
    for (let i = 0; i < writers; i++) {
      const run = benchRun(`memory-${viewerCount}-${i}`);
      const windows = benchWindows(run, Math.ceil((s.memorySeconds * rate) / 300) + 10, 300 + i);
      const sink = new RemoteSink({ url: child.ws, closeTimeoutMs: 20_000, onError: collectErrors(errors) });
      await sink.open(run);
      runs.push({ run, windows, sink, sent: 0, points: 0 });
    }
    while (runs.some((r) => r.sink.unacknowledged > 0)) await sleep(10);
    let deliveries = 0;
    const viewers: WebSocket[] = [];
    for (let i = 0; i < viewerCount; i++) {
      const ws = new WebSocket(`${child.ws}/live`);
      ws.on('message', (data) => {
        if (String(data).startsWith('{"v":1,"type":"window"')) deliveries++;
      });
      await new Promise<void>((resolve, reject) => {
        ws.once('open', () => resolve());
        ws.once('error', reject);
      });
      ws.send(encodeJson({ v: 1, type: 'subscribe', run: runs[i % writers]!.run.id }));
      viewers.push(ws);
    }
    const samples: number[] = [];
    const sampler = setInterval(() => samples.push(rssMb(child.pid)), 1000);
    const t0 = performance.now();
    const end = t0 + s.memorySeconds * 1000;
    await Promise.all(
      runs.map(async (r, i) => {
        const begin = t0 + (i * 100) / writers;
        while (r.sent < r.windows.length) {
          const due = begin + (r.points / rate) * 1000;
          if (due >= end) break;
          const wait = due - performance.now();
          if (wait > 0) await sleep(wait);
          const window = r.windows[r.sent]!;
          r.sink.write({ type: 'window', window });
          await r.sink.flush();
          r.sent++;
          r.points += windowPoints(window);
        }
      }),
    );
    const seconds = (performance.now() - t0) / 1000;
    clearInterval(sampler);
    const last = rssMb(child.pid);
    await Promise.all(runs.map((r) => r.sink.close()));
    await sleep(500);
    for (const ws of viewers) ws.terminate();
    const dropped = runs.reduce((a, r) => a + r.sink.dropped, 0);
    const points = runs.reduce((a, r) => a + r.points, 0);
    const windows = runs.reduce((a, r) => a + r.sent, 0);
    const firstThird = samples.slice(0, Math.max(1, Math.floor(samples.length / 3)));
    const lastThird = samples.slice(-Math.max(1, Math.floor(samples.length / 3)));
    return [
      `${writers} writers${viewerCount > 0 ? ` + ${viewerCount} viewers` : ''}`,
      fmtInt(points / seconds),
      `${fmtInt(windows)}${viewerCount > 0 ? ` / ${fmtInt(deliveries)}` : ''}`,
      start.toFixed(0),
      Math.max(...firstThird).toFixed(0),
      Math.max(...lastThird).toFixed(0),
      Math.max(start, last, ...samples).toFixed(0),
      last.toFixed(0),
      `${errors.length}/${dropped}`,
    ];
  } finally {
    await child.stop();
  }
}

async function memoryTable(dir: string, s: Settings): Promise<void> {
  const rows: string[][] = [];
  for (const viewers of [0, 50]) {
    progress(`memory: 8 writers at 1,000 points/s${viewers > 0 ? ` and ${viewers} viewers` : ''} for ${s.memorySeconds} s`);
    rows.push(await memoryRow(dir, s, viewers));
  }
  printTable(
    `Table 3. Server memory (VmRSS of the child, MiB) under 8 RemoteSink writers at 1,000 points/s each, ${s.memorySeconds} s per row`,
    ['load', 'points/s', 'windows / to viewers', 'start', '1st-third max', 'last-third max', 'max', 'end', 'reports/dropped'],
    rows,
    [
      `Windows of a ${LAYERS}-layer model, each writer flushing after every window as the monitor does; RSS read from /proc/<pid>/status every second.`,
      'start: the server idle, before the writers connect; end: as the last window is written. A fresh server (and file) per row.',
    ],
  );
}

// ---------------------------------------------------------------------------------------------

async function main(): Promise<void> {
  const s = readSettings();
  if (s === null) return;
  const dir = mkdtempSync(join(tmpdir(), 'tidemark-bench-server-'));
  const t0 = performance.now();
  console.log(`tidemark server bench${s.quick ? ' (--quick)' : ''}: Node ${process.version}, server as a child process on loopback`);
  try {
    await ingestTable(dir, s);
    await latencyTable(dir, s);
    await memoryTable(dir, s);
  } finally {
    rmSync(dir, { recursive: true, force: true });
  }
  console.log(`\nTotal ${((performance.now() - t0) / 1000).toFixed(0)} s.`);
}

await main();
