/**
 * Training runs meeting the server: one served in-process (`serve`), one sent to a server over the
 * network (`store: 'ws://…'`), and one whose server is killed with SIGKILL and restarted five times
 * while it trains. What the server stores is compared with what the monitor produced, and with a JSON
 * Lines copy written locally alongside.
 */
import { mkdtempSync, readFileSync, rmSync } from 'node:fs';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import { afterAll, beforeAll, describe, expect, it } from 'vitest';
import WebSocket from 'ws';
import { monitor } from '../../src/index.js';
import type { RunInfo, SinkRecord, WindowRecord } from '../../src/protocol/records.js';
import { startServer } from '../../src/server/serve.js';
import { JsonlSink } from '../../src/storage/jsonl-sink.js';
import { RemoteSink } from '../../src/storage/remote-sink.js';
import { decodeJson, decodeRecord, encodeJson, type Sink } from '../../src/storage/sink.js';
import { openStore } from '../../src/storage/sqlite-store.js';
import { connectStore } from '../../src/storage/connect-store.js';
import { postgresMissing, startPostgres, type PgCluster } from '../helpers/postgres.js';
import { freePort, startServerChild } from '../helpers/server-child.js';
import { blobTensors, denseModel, tf, useCpu } from '../helpers/tf.js';

const dir = mkdtempSync(join(tmpdir(), 'tidemark-remote-'));
let cluster: PgCluster | null = null;
beforeAll(async () => {
  await useCpu();
  if (postgresMissing === null) cluster = await startPostgres();
}, 60_000);
afterAll(() => {
  cluster?.stop();
  rmSync(dir, { recursive: true, force: true });
});

describe('serve: a port in monitor()', () => {
  it('serves the run while it trains: the API lists it and a viewer gets its windows live', async () => {
    const db = join(dir, 'served.db');
    const model = denseModel({ inputs: 4, hidden: [6], outputs: 2 });
    const mon = await monitor(model, { store: db, run: 'served-run', window: 4, serve: 0 });
    expect(mon.url).toMatch(/^http:\/\/127\.0\.0\.1:\d+$/);
    const runs = (await (await fetch(`${mon.url}/api/runs`)).json()) as { id: string }[];
    expect(runs.map((r) => r.id)).toEqual([mon.runId]);
    const viewer = new WebSocket(`${mon.url!.replace('http', 'ws')}/live`);
    const got: { type: string; window?: WindowRecord }[] = [];
    viewer.on('message', (d) => got.push(decodeJson(String(d)) as { type: string }));
    await new Promise((r) => viewer.once('open', r));
    viewer.send(encodeJson({ v: 1, type: 'subscribe', run: mon.runId }));
    const { xs, ys } = blobTensors(64, 4, 2);
    await model.fit(xs, ys, { epochs: 3, batchSize: 8, shuffle: false, verbose: 0, callbacks: [mon.callback] });
    await mon.flush();
    const deadline = Date.now() + 3000;
    const seen = (): number => got.filter((m) => m.type === 'window').length + ((got.find((m) => m.type === 'backfill') as { windows?: unknown[] } | undefined)?.windows?.length ?? 0);
    while (Date.now() < deadline && seen() < 6) {
      await new Promise((r) => setTimeout(r, 50));
    }
    const back = got.find((m) => m.type === 'backfill') as unknown as { windows: WindowRecord[] };
    const live = got.filter((m) => m.type === 'window').map((m) => m.window!);
    expect([...back.windows, ...live].map((w) => w.index)).toEqual([0, 1, 2, 3, 4, 5]);
    expect(live).toEqual(mon.windows().slice(back.windows.length));
    viewer.close();
    const url = mon.url!;
    await mon.close();
    expect(mon.url).toBeNull();
    await expect(fetch(`${url}/healthz`)).rejects.toThrow();
    tf.dispose([xs, ys]);
  });
});

describe("store: 'ws://…' in monitor()", () => {
  it('stores every window and marker on the server, equal to the monitor’s own', async () => {
    const store = openStore(join(dir, 'remote.db'));
    const server = await startServer({ store, port: 0 });
    const model = denseModel({ inputs: 4, hidden: [6], outputs: 2 });
    const mon = await monitor(model, { store: server.url.replace('http', 'ws'), run: 'remote-run', window: 4 });
    const { xs, ys } = blobTensors(64, 4, 2);
    await model.fit(xs, ys, { epochs: 4, batchSize: 8, shuffle: false, verbose: 0, callbacks: [mon.callback] });
    await mon.close();
    expect(mon.warnings()).toEqual([]);
    expect(store.windows(mon.runId)).toEqual(mon.windows());
    expect(store.markers(mon.runId)).toEqual(expect.arrayContaining(mon.markers().map((m) => expect.objectContaining({ kind: m.kind, step: m.step }))));
    expect(store.runs()[0]).toMatchObject({ id: mon.runId, status: 'finished', windows: 8 });
    await server.close();
    store.close();
    tf.dispose([xs, ys]);
  });
});

/** Every record goes to both sinks: the remote one under test and a local JSON Lines copy. */
class TeeSink implements Sink {
  constructor(private readonly a: Sink, private readonly b: Sink) {}
  get dropped(): number {
    return this.a.dropped + this.b.dropped;
  }
  async open(run: RunInfo): Promise<void> {
    await Promise.all([this.a.open(run), this.b.open(run)]);
  }
  write(record: SinkRecord): void {
    this.a.write(record);
    this.b.write(record);
  }
  async flush(): Promise<void> {
    await Promise.all([this.a.flush(), this.b.flush()]);
  }
  async close(): Promise<void> {
    await Promise.all([this.a.close(), this.b.close()]);
  }
}



for (const backend of ['sqlite', 'postgres'] as const) {
describe.skipIf(backend === 'postgres' && postgresMissing !== null)(`a server killed with SIGKILL and restarted 5 times during a remote run (${backend} store${backend === 'postgres' && postgresMissing !== null ? `; skipped: ${postgresMissing}` : ''})`, () => {
  it('ends with every window stored exactly once, equal to the local JSON Lines copy', async () => {
    const db = backend === 'sqlite' ? join(dir, 'killed.db') : `${cluster!.urlOf('postgres')}?schema=killed`;
    const copy = join(dir, `killed-copy-${backend}.jsonl`);
    // Every restart reuses the port, as a user restarting `tidemark serve` would.
    const probePort = await freePort();
    let child = await startServerChild(db, { port: probePort });
    const reports: string[] = [];
    const remote = new RemoteSink({
      url: `ws://127.0.0.1:${probePort}`,
      backoff: { initialMs: 50, maxMs: 400 },
      // A restart sometimes takes several seconds on a loaded 2-core machine while training keeps producing
      // windows; the backlog then needs longer than the default to drain. What is checked is that none is lost.
      closeTimeoutMs: 90_000,
      onError: (e) => reports.push(`${(e as { code?: string }).code} ${(e as Error).message}`),
    });
    const sink = new TeeSink(remote, new JsonlSink(copy));
    const model = denseModel({ inputs: 4, hidden: [16, 8], outputs: 2 });
    const warnings: string[] = [];
    const mon = await monitor(model, { store: sink, run: 'killed-server', window: 2, onWarning: (w) => warnings.push(`${w.code} ${w.message}`) });
    const { xs, ys } = blobTensors(256, 4, 2);
    let kills = 0;
    const killer = (async () => {
      while (kills < 5) {
        await new Promise((r) => setTimeout(r, 700));
        const exited = new Promise((r) => child.proc.once('exit', r));
        child.proc.kill('SIGKILL');
        await exited;
        kills++;
        await new Promise((r) => setTimeout(r, 150));
        child = await startServerChild(db, { port: probePort });
      }
    })();
    // Keep training until the five kills are done.
    while (kills < 5) await model.fit(xs, ys, { epochs: 2, batchSize: 8, shuffle: false, verbose: 0, callbacks: [mon.callback] });
    await killer;
    await mon.close();
    await child.stop();
    expect(kills).toBe(5);
    expect(reports.filter((r) => !r.startsWith('TIDEMARK_ERR_REMOTE_CONNECT'))).toEqual([]);
    expect(warnings.filter((w) => !w.startsWith('TIDEMARK_ERR_REMOTE_CONNECT'))).toEqual([]);
    expect(remote.dropped).toBe(0);

    const local = readFileSync(copy, 'utf8').trim().split('\n').map(decodeRecord);
    const localWindows = local.filter((r) => r.type === 'window').map((r) => (r as { window: WindowRecord }).window);
    const store = await connectStore(db, { readonly: true });
    const stored = await store.windows(mon.runId);
    expect(localWindows.length).toBeGreaterThan(50);
    expect(stored).toEqual(localWindows);
    expect(new Set(stored.map((w) => w.index)).size).toBe(stored.length);
    expect((await store.runs())[0]).toMatchObject({ id: mon.runId, status: 'finished', windows: localWindows.length });
    console.log(`SIGKILL test (${backend}): ${kills} kills, ${stored.length} windows stored once each, ${reports.length} connection losses reported`);
    await store.close();
    tf.dispose([xs, ys]);
  }, 240_000);
});
}
