/**
 * Two `tidemark serve` processes on one PostgreSQL database (issue 14): 8 remote writers, four sending to
 * each server, and one live viewer per run on each server (so half the viewers follow a run that the other
 * server stores). Server A is killed with SIGKILL and restarted on its port three times while the windows
 * flow; its writers resend what was not acknowledged, and its viewers reconnect and subscribe again after
 * the last window they have, as the page does.
 *
 * Checked at the end: every window of every writer is stored exactly once and equal to what was written
 * (exactly-once ingest across servers: (run, seq) is unique in the database); every viewer, whichever
 * server it was connected to, received every window of its run exactly once and in step order.
 *
 * Needs PostgreSQL server binaries (test/helpers/postgres.ts): required in CI, skipped locally without them.
 */
import { afterAll, beforeAll, describe, expect, it } from 'vitest';
import WebSocket from 'ws';
import type { LiveMessage } from '../../src/protocol/messages.js';
import type { RunInfo, WindowRecord } from '../../src/protocol/records.js';
import { openPostgresStore } from '../../src/storage/postgres-store.js';
import { RemoteSink } from '../../src/storage/remote-sink.js';
import { decodeJson, encodeJson } from '../../src/storage/sink.js';
import { postgresMissing, startPostgres, type PgCluster } from '../helpers/postgres.js';
import { freePort, startServerChild, type ServerChild } from '../helpers/server-child.js';
import { fakeRun, fakeWindows } from '../helpers/window-records.js';

const WRITERS = 8;
const WINDOWS = 40;
const KILLS = 3;
const sleep = (ms: number): Promise<void> => new Promise((r) => setTimeout(r, ms));

let cluster: PgCluster | null = null;
beforeAll(async () => {
  if (postgresMissing === null) cluster = await startPostgres();
}, 60_000);
afterAll(() => cluster?.stop());

/** A viewer that, like the page, reconnects after its server went away and subscribes after its last window. */
class Follower {
  readonly got: WindowRecord[] = [];
  readonly errors: string[] = [];
  private ws: WebSocket | null = null;
  private closed = false;

  constructor(
    private readonly url: string,
    readonly run: string,
  ) {}

  start(): void {
    if (this.closed) return;
    const ws = new WebSocket(this.url);
    this.ws = ws;
    ws.on('open', () => {
      const after = this.got.at(-1)?.step;
      ws.send(encodeJson({ v: 1, type: 'subscribe', run: this.run, points: 100_000, ...(after !== undefined ? { after } : {}) }));
    });
    ws.on('message', (data) => {
      const m = decodeJson(String(data)) as LiveMessage;
      if (m.type === 'backfill') this.got.push(...m.windows);
      else if (m.type === 'window') this.got.push(m.window);
      else if (m.type === 'gap') this.errors.push(`gap after ${m.after_step}`);
      else if (m.type === 'error' && m.code !== 'TIDEMARK_ERR_RUN_NOT_FOUND') this.errors.push(`${m.code}: ${m.message}`);
      else if (m.type === 'error') setTimeout(() => ws.close(), 50);
    });
    ws.on('error', () => undefined);
    ws.on('close', () => {
      if (!this.closed) setTimeout(() => this.start(), 100);
    });
  }

  stop(): void {
    this.closed = true;
    this.ws?.close();
  }
}

describe.skipIf(postgresMissing !== null)(`two servers on one PostgreSQL database${postgresMissing === null ? '' : ` (skipped: ${postgresMissing})`}`, () => {
  it(`stores every window once and streams it once, in order, to viewers of either server, across ${KILLS} SIGKILLs of one server`, { timeout: 180_000 }, async () => {
    const db = cluster!.urlOf('postgres');
    const [portA, portB] = [await freePort(), await freePort()];
    const serverErr: string[] = [];
    let a: ServerChild = await startServerChild(db, { port: portA, stderr: serverErr });
    const b: ServerChild = await startServerChild(db, { port: portB, stderr: serverErr });
    const followers: Follower[] = [];
    const sinks: RemoteSink[] = [];
    try {
      const writers = Array.from({ length: WRITERS }, (_, i) => {
        const run: RunInfo = fakeRun({ id: `multi-run-${i}`, name: `multi ${i}`, layers: 3, started_at: Date.now() });
        const port = i < WRITERS / 2 ? portA : portB;
        const reports: string[] = [];
        const sink = new RemoteSink({
          url: `ws://127.0.0.1:${port}/ingest`,
          closeTimeoutMs: 30_000,
          backoff: { initialMs: 50, maxMs: 500 },
          onError: (e) => {
            const code = (e as { code?: string }).code ?? '';
            // A server killed under a writer is what this test does: the writer says so and reconnects.
            if (code !== 'TIDEMARK_ERR_REMOTE_CONNECT') reports.push(`${code} ${(e as Error).message}`);
          },
        });
        sinks.push(sink);
        return { run, sink, reports, windows: fakeWindows(run, WINDOWS, 200 + i) };
      });
      for (const w of writers) await w.sink.open(w.run);
      for (const w of writers) {
        for (const port of [portA, portB]) {
          const f = new Follower(`ws://127.0.0.1:${port}/live`, w.run.id);
          followers.push(f);
          f.start();
        }
      }

      // Windows flow for about 8 s; server A is killed and restarted three times meanwhile.
      const flow = (async () => {
        for (let k = 0; k < WINDOWS; k++) {
          for (const w of writers) w.sink.write({ type: 'window', window: w.windows[k]! });
          await Promise.all(writers.map((w) => w.sink.flush().catch(() => undefined)));
          await sleep(200);
        }
      })();
      for (let kill = 0; kill < KILLS; kill++) {
        await sleep(1500);
        a.proc.kill('SIGKILL');
        await new Promise((r) => a.proc.once('exit', r));
        await sleep(300);
        a = await startServerChild(db, { port: portA, stderr: serverErr });
      }
      await flow;
      for (const w of writers) w.sink.write({ type: 'end', run: w.run.id, status: 'finished', step: w.windows.at(-1)!.step, time: Date.now() });
      await Promise.all(writers.map((w) => w.sink.close()));

      // --- Writers: everything acknowledged, nothing dropped.
      for (const w of writers) {
        expect(w.reports, w.run.id).toEqual([]);
        expect(w.sink.dropped, w.run.id).toBe(0);
      }

      // --- The database: every window exactly once, equal to what was written.
      const store = await openPostgresStore(db, { readonly: true });
      try {
        for (const w of writers) {
          const stored = await store.windows(w.run.id);
          expect(stored.map((x) => x.index), w.run.id).toEqual(w.windows.map((x) => x.index));
          expect(stored.map((x) => encodeJson(x)), w.run.id).toEqual(w.windows.map((x) => encodeJson(x)));
        }
      } finally {
        await store.close();
      }

      // --- Viewers: every window once and in order, whichever server they follow.
      const complete = (f: Follower): boolean => f.got.length >= WINDOWS;
      for (let t = Date.now(); Date.now() - t < 20_000 && !followers.every(complete); ) await sleep(100);
      for (const f of followers) {
        const who = `${f.run} viewer`;
        expect(f.errors, who).toEqual([]);
        expect(f.got.map((x) => x.index), who).toEqual(Array.from({ length: WINDOWS }, (_, k) => k));
      }
      // Stopped as a user would (SIGTERM): a poll in flight must not outlive the store it reads.
      for (const f of followers) f.stop();
      await a.stop();
      await b.stop();
      expect(serverErr.join(''), 'server stderr').toBe('');
    } finally {
      for (const f of followers) f.stop();
      for (const s of sinks) await s.close().catch(() => undefined);
      await a.stop();
      await b.stop();
    }
  });
});
