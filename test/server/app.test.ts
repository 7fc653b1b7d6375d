/**
 * The server in-process: HTTP routes through fastify's inject, WebSocket ingest and live stream through
 * the ws package's own client (an independent implementation of RFC 6455) on a loopback port.
 */
import { readFileSync } from 'node:fs';
import { connect, type AddressInfo } from 'node:net';
import { afterAll, afterEach, beforeAll, describe, expect, it } from 'vitest';
import WebSocket from 'ws';
import type { IngestReply, LiveMessage as ViewerBound } from '../../src/protocol/messages.js';

type LiveMessage = ViewerBound | IngestReply;
import type { SinkRecord, WindowRecord } from '../../src/protocol/records.js';
import { buildServer, FAVICON_SVG, type ServerOptions, type TidemarkServer } from '../../src/server/app.js';
import { withoutVariables } from '../../src/protocol/records.js';
import { exportRun } from '../../src/storage/export.js';
import { decodeJson, encodeJson } from '../../src/storage/sink.js';
import { asAsyncStore, type AsyncStore } from '../../src/storage/async-store.js';
import { openPostgresStore } from '../../src/storage/postgres-store.js';
import { openStore } from '../../src/storage/sqlite-store.js';
import { postgresMissing, startPostgres, type PgCluster } from '../helpers/postgres.js';
import { fakeMarkers, fakeRun, fakeWindows } from '../helpers/window-records.js';

// Every test of the HTTP API, the ingest and the live stream runs on both store backends (issue 14).
let cluster: PgCluster | null = null;
let schemaNo = 0;
beforeAll(async () => {
  if (postgresMissing === null) cluster = await startPostgres();
}, 60_000);
afterAll(() => cluster?.stop());

interface Backend {
  name: string;
  skip: string | null;
  open(): Promise<AsyncStore>;
}
const BACKENDS: Backend[] = [
  { name: 'sqlite', skip: null, open: async () => asAsyncStore(openStore(':memory:')) },
  { name: 'postgres', skip: postgresMissing, open: () => openPostgresStore(cluster!.url, { schema: `app_${schemaNo++}` }) },
];
let backend: Backend = BACKENDS[0]!;

const open: { server: TidemarkServer; store: AsyncStore }[] = [];
afterEach(async () => {
  for (const o of open.splice(0)) {
    await o.server.close();
    await o.store.close();
  }
});

async function serve(options: Partial<ServerOptions> = {}): Promise<{ server: TidemarkServer; store: AsyncStore; url: string; ws: string }> {
  const store = await backend.open();
  const server = await buildServer({ store, pollMs: 50, onError: () => {}, ...options });
  await server.app.listen({ host: '127.0.0.1', port: 0 });
  open.push({ server, store });
  const port = (server.app.server.address() as AddressInfo).port;
  return { server, store, url: `http://127.0.0.1:${port}`, ws: `ws://127.0.0.1:${port}` };
}

async function seed(store: AsyncStore, id = 'run-00000001', windows = 12): Promise<{ run: ReturnType<typeof fakeRun>; ws: WindowRecord[] }> {
  const run = fakeRun({ id, name: `name-${id}` });
  const ws = fakeWindows(run, windows);
  await store.beginRun(run);
  await store.append([...ws.map((window): SinkRecord => ({ type: 'window', window })), ...fakeMarkers(run).map((marker): SinkRecord => ({ type: 'marker', marker }))]);
  return { run, ws };
}

/** A client that collects every message it is sent. */
async function client(url: string, headers: Record<string, string> = {}): Promise<{ ws: WebSocket; got: LiveMessage[]; next: (pred: (m: LiveMessage) => boolean, ms?: number) => Promise<LiveMessage> }> {
  const ws = new WebSocket(url, { headers });
  const got: LiveMessage[] = [];
  const waiters: { pred: (m: LiveMessage) => boolean; resolve: (m: LiveMessage) => void }[] = [];
  ws.on('message', (data) => {
    const m = decodeJson(String(data)) as LiveMessage;
    got.push(m);
    for (const w of waiters.slice()) {
      if (w.pred(m)) {
        waiters.splice(waiters.indexOf(w), 1);
        w.resolve(m);
      }
    }
  });
  await new Promise<void>((resolve, reject) => {
    ws.once('open', () => resolve());
    ws.once('error', reject);
  });
  const next = (pred: (m: LiveMessage) => boolean, ms = 3000): Promise<LiveMessage> => {
    const found = got.find(pred);
    if (found !== undefined) return Promise.resolve(found);
    return new Promise((resolve, reject) => {
      const t = setTimeout(() => reject(new Error(`no matching message within ${ms} ms; got ${got.map((g) => g.type).join(',')}`)), ms);
      waiters.push({ pred, resolve: (m) => (clearTimeout(t), resolve(m)) });
    });
  };
  return { ws, got, next };
}

const batch = (run: string, seq: number, records: SinkRecord[]): string => encodeJson({ v: 1, type: 'batch', run, seq, records });

for (const each of BACKENDS) {
  describe.skipIf(each.skip !== null)(`${each.name} store${each.skip === null ? '' : ` (skipped: ${each.skip})`}`, () => {
    beforeAll(() => {
      backend = each;
    });

    describe('HTTP API', () => {
      it('lists runs, resolves a run by name, reads a downsampled series and the markers', async () => {
        const { server, store } = await serve();
        const { run, ws } = await seed(store);
        const runs = await server.app.inject('/api/runs');
        expect(runs.statusCode).toBe(200);
        expect((runs.json() as { id: string }[]).map((r) => r.id)).toEqual([run.id]);
        const one = await server.app.inject(`/api/runs/${encodeURIComponent(run.name)}`);
        expect(one.json()).toMatchObject({ id: run.id, layers: run.layers });
        const series = await server.app.inject(`/api/runs/${run.id}/series?metric=weight_norm&layer=dense_Dense2&points=4`);
        const body = decodeJson(series.body) as { points: { step: number; value: number }[] };
        expect(body.points).toEqual(await store.series(run.id, 'weight_norm', { layer: 'dense_Dense2', points: 4 }));
        expect(body.points.length).toBe(4);
        expect(body.points[0]!.step).toBe(ws[0]!.step);
        const markers = await server.app.inject(`/api/runs/${run.id}/markers`);
        // Infinity in marker details travels as the string "Infinity", as in JSON Lines exports.
        expect(decodeJson(markers.body)).toEqual(await store.markers(run.id));
        const windows = await server.app.inject(`/api/runs/${run.id}/windows?after=${ws[9]!.step}`);
        expect(decodeJson(windows.body)).toEqual(ws.slice(10));
        // A zoomed chart's request: an inclusive range, thinned within it.
        const zoomed = await server.app.inject(`/api/runs/${run.id}/windows?from=${ws[2]!.step}&to=${ws[6]!.step}&points=3`);
        expect(decodeJson(zoomed.body)).toEqual([ws[2], ws[4], ws[6]]);
        const lean = await server.app.inject(`/api/runs/${run.id}/windows?from=${ws[2]!.step}&to=${ws[3]!.step}&variables=false`);
        expect(decodeJson(lean.body)).toEqual([ws[2], ws[3]].map((w) => withoutVariables(w!)));
        const bad = await server.app.inject(`/api/runs/${run.id}/windows?from=abc`);
        expect(bad.statusCode).toBe(400);
      });

      it('lists groups and reads one group together (issue 15)', async () => {
        const { server, store } = await serve();
        for (const [k, id] of ['g-0001', 'g-0002', 'g-0003'].entries()) {
          const run = fakeRun({ id, name: id, group: 'sweep-a', started_at: 1_700_000_000_000 + k });
          await store.beginRun(run);
          await store.append([
            // 12 windows: past the first epoch (80 minibatches), so the epoch length is known.
            ...fakeWindows(run, 12).map((window): SinkRecord => ({ type: 'window', window })),
            { type: 'marker', marker: { run: id, layer: null, kind: 'diffusion-start', step: 24 + 8 * k, detected_step: 40, confidence: 0.8, details: {} } },
          ]);
        }
        await seed(store, 'lone-0001', 2);
        const groups = await server.app.inject('/api/groups');
        expect(groups.json()).toEqual([{ group: 'sweep-a', runs: 3 }]);
        const one = decodeJson((await server.app.inject('/api/groups/sweep-a')).body) as { runs: { id: string }[]; layers: { position: number | null; transitions: number[]; transition: { median: number } }[] };
        expect(one.runs.map((r) => r.id)).toEqual(['g-0001', 'g-0002', 'g-0003']);
        const network = one.layers.find((l) => l.position === null)!;
        expect(network.transitions).toEqual([24, 32, 40]);
        expect(network.transition.median).toBe(32);
        const swept = decodeJson((await server.app.inject('/api/groups/sweep-a?sweep=seed')).body) as { sweep: { points: unknown[]; left: { why: string }[] } };
        // fakeRun tags seed=… only when asked: with no such tag every run is left out, each with the reason.
        expect(swept.sweep.points.length + swept.sweep.left.length).toBe(3);
        expect((await server.app.inject('/api/groups/sweep-a?outcome=best')).statusCode).toBe(400);
        // By epoch (80 minibatches each in these runs), with a loss target: the same numbers as the CLI's.
        const byEpoch = decodeJson((await server.app.inject('/api/groups/sweep-a?align=epoch&lossTarget=0.5&sweep=seed&outcome=loss-target')).body) as {
          align: string;
          layers: { position: number | null; transitions: number[] }[];
          outcomes: { lossTarget: number | null }[];
          sweep: { units: string };
        };
        expect(byEpoch.align).toBe('epoch');
        expect(byEpoch.layers.find((l) => l.position === null)!.transitions).toEqual([24 / 80, 32 / 80, 40 / 80]);
        expect(byEpoch.outcomes.every((o) => o.lossTarget !== null && o.lossTarget < 1)).toBe(true);
        expect(byEpoch.sweep.units).toBe('epochs');
        expect((await server.app.inject('/api/groups/sweep-a?align=week')).statusCode).toBe(400);
        expect((await server.app.inject('/api/groups/sweep-a?lossTarget=-1')).statusCode).toBe(400);
        const none = await server.app.inject('/api/groups/nobody');
        expect(none.statusCode).toBe(404);
        expect(none.json()).toMatchObject({ error: { code: 'TIDEMARK_ERR_RUN_NOT_FOUND' } });
      });

      it('exports a run as CSV and JSON Lines, byte for byte what exportRun gives', async () => {
        const { server, store } = await serve();
        const { run } = await seed(store);
        for (const format of ['csv', 'jsonl'] as const) {
          const r = await server.app.inject(`/api/runs/${run.id}/export?format=${format}`);
          expect(r.statusCode).toBe(200);
          expect(r.body).toBe(await exportRun(store, run.id, format));
          expect(r.headers['content-disposition']).toBe(`attachment; filename="name-run-00000001.${format}"`);
        }
      });

      it('answers unknown runs, routes and parameters with coded errors', async () => {
        const { server } = await serve();
        const cases: [string, number, string][] = [
          ['/api/runs/nope', 404, 'TIDEMARK_ERR_RUN_NOT_FOUND'],
          ['/api/nothing', 404, 'TIDEMARK_ERR_NOT_FOUND'],
          ['/api/runs?colour=red', 400, 'TIDEMARK_ERR_REQUEST_INVALID'],
          ['/api/runs?limit=-3', 400, 'TIDEMARK_ERR_REQUEST_INVALID'],
          ['/api/runs/x/series', 400, 'TIDEMARK_ERR_REQUEST_INVALID'],
          ['/api/runs/x/export?format=xml', 400, 'TIDEMARK_ERR_REQUEST_INVALID'],
        ];
        for (const [url, status, code] of cases) {
          const r = await server.app.inject(url);
          expect(r.statusCode, url).toBe(status);
          expect((r.json() as { error: { code: string } }).error.code, url).toBe(code);
        }
      });

      it('answers an unknown metric or layer, and from > to, with 400 naming the parameter and what exists (docs/protocol.md)', async () => {
        const { server, store } = await serve();
        const { run } = await seed(store);
        const get = async (q: string) => {
          const r = await server.app.inject(`/api/runs/${run.id}/${q}`);
          return { status: r.statusCode, error: (r.json() as { error?: { code: string; message: string } }).error };
        };
        const metric = await get('series?metric=weight_nrom');
        expect(metric.status).toBe(400);
        expect(metric.error).toMatchObject({ code: 'TIDEMARK_ERR_REQUEST_INVALID' });
        expect(metric.error!.message).toContain("Query parameter 'metric': this run has no series 'weight_nrom'. Did you mean 'weight_norm'?");
        const layer = await get('series?metric=weight_norm&layer=no_such_layer');
        expect(layer.status).toBe(400);
        expect(layer.error!.message).toContain("Query parameter 'layer': 'weight_norm' has no series for layer 'no_such_layer'. It has: ");
        expect(layer.error!.message).toContain('dense_Dense2');
        const range = await get('series?metric=weight_norm&layer=dense_Dense2&from=50&to=10');
        expect(range.status).toBe(400);
        expect(range.error!.message).toContain("'from' (50) and 'to' (10): from must not be greater than to");
        expect((await get('windows?from=50&to=10')).status).toBe(400);
        expect((await get('series?metric=weight_norm&layer=dense_Dense2&from=10&to=50')).status).toBe(200);
      });

      it("stops everything with fastify's own app.close(): no polling of a store closed after it", async () => {
        const store = await backend.open();
        const errors: unknown[] = [];
        const server = await buildServer({ store, pollMs: 10, onError: (e) => void errors.push(e) });
        await server.app.listen({ host: '127.0.0.1', port: 0 });
        await server.app.close();
        await store.close();
        await new Promise((r) => setTimeout(r, 200));
        expect(errors).toEqual([]);
      });

      it('never shows a database message to a client', async () => {
        const store = await backend.open();
        // The store as it is, but for runs(), which fails as a damaged database would.
        const broken = new Proxy(store, {
          get(target, key) {
            if (key === 'runs') return () => Promise.reject(Object.assign(new Error('SQLITE_CORRUPT: database disk image is malformed at /secret/path.db'), { code: 'SQLITE_CORRUPT' }));
            const v = Reflect.get(target, key, target) as unknown;
            return typeof v === 'function' ? (v as (...a: unknown[]) => unknown).bind(target) : v;
          },
        });
        const errors: unknown[] = [];
        const server = await buildServer({ store: broken, onError: (e) => errors.push(e), pollMs: 60_000 });
        open.push({ server, store });
        const r = await server.app.inject('/api/runs');
        expect(r.statusCode).toBe(500);
        expect(r.json()).toEqual({ error: { code: 'TIDEMARK_ERR_INTERNAL', message: expect.any(String) } });
        expect(r.body).not.toMatch(/SQLITE|secret/);
        expect(errors.length).toBeGreaterThan(0);
      });

      it('with a token: refuses requests without it, accepts Bearer and ?token=, keeps /healthz open', async () => {
        const { server } = await serve({ token: 's3cret' });
        expect((await server.app.inject('/api/runs')).statusCode).toBe(401);
        expect((await server.app.inject({ url: '/api/runs', headers: { authorization: 'Bearer wrong' } })).statusCode).toBe(401);
        expect((await server.app.inject({ url: '/api/runs', headers: { authorization: 'Bearer s3cret' } })).statusCode).toBe(200);
        expect((await server.app.inject('/api/runs?token=s3cret')).statusCode).toBe(200);
        expect((await server.app.inject('/metrics')).statusCode).toBe(401);
        expect((await server.app.inject('/healthz')).json()).toEqual({ status: 'ok' });
      });

      it('sends no CORS header unless asked to', async () => {
        const { server } = await serve();
        expect((await server.app.inject('/api/runs')).headers['access-control-allow-origin']).toBeUndefined();
        const { server: open2 } = await serve({ cors: 'http://example.test' });
        expect((await open2.app.inject('/api/runs')).headers['access-control-allow-origin']).toBe('http://example.test');
      });

      it('serves /metrics as OpenMetrics with the run and layer as labels', async () => {
        const { server, store } = await serve();
        const { run, ws } = await seed(store);
        // A probe window, then one without probe values: the probe gauges show the probe window's values.
        const [probed, plain] = fakeWindows(run, 14).slice(12);
        // Likewise the noise scale, measured now and then: the probe window carries a measured value, the last none.
        const withProbe = {
          ...probed!,
          network: { ...probed!.network, noise_scale: 321.5 },
          layers: { ...probed!.layers, dense_Dense2: { ...probed!.layers.dense_Dense2!, mi_input: 4.25, mi_label: 0.75, mi_saturated: 0 } },
        };
        const unmeasured = { ...plain!, network: { ...plain!.network, noise_scale: null } };
        await store.append([withProbe, unmeasured].map((window): SinkRecord => ({ type: 'window', window })));
        await store.heartbeat(run.id);
        const r = await server.app.inject('/metrics');
        expect(r.headers['content-type']).toBe('application/openmetrics-text; version=1.0.0; charset=utf-8');
        expect(r.body.endsWith('# EOF\n')).toBe(true);
        const last = plain!;
        expect(ws).toHaveLength(12);
        expect(r.body).toContain(`tidemark_grad_snr_db{run="${run.id}",run_name="${run.name}",layer="dense_Dense1"} `);
        expect(r.body).toContain(`tidemark_mi_input{run="${run.id}",run_name="${run.name}",layer="dense_Dense2"} 4.25\n`);
        expect(r.body).toContain(`tidemark_mi_label{run="${run.id}",run_name="${run.name}",layer="dense_Dense2"} 0.75\n`);
        expect(r.body).not.toContain(`tidemark_mi_input{run="${run.id}",run_name="${run.name}",layer="dense_Dense1"}`);
        expect(r.body).toContain(`tidemark_last_step{run="${run.id}",run_name="${run.name}"} ${last.step}`);
        expect(r.body).toContain(`tidemark_noise_scale{run="${run.id}",run_name="${run.name}",layer="(network)"} 321.5\n`);
        // fakeMarkers: the network's last phase marker is a diffusion-start.
        expect(r.body).toContain(`tidemark_phase{run="${run.id}",run_name="${run.name}",layer="(network)",phase="diffusion"} 1`);
      });
    });

    describe('WebSocket ingest', () => {
      it('stores a batch once, acknowledges it, and answers a resend as a duplicate', async () => {
        const { ws: base, store, server } = await serve();
        const c = await client(`${base}/ingest`);
        const run = fakeRun({ id: 'remote-1' });
        const ws = fakeWindows(run, 3);
        c.ws.send(batch(run.id, 0, [{ type: 'run', run }, ...ws.map((window): SinkRecord => ({ type: 'window', window }))]));
        expect(await c.next((m) => m.type === 'ack')).toEqual({ v: 1, type: 'ack', run: run.id, seq: 0, duplicate: false });
        c.ws.send(batch(run.id, 0, [{ type: 'run', run }]));
        expect(await c.next((m) => m.type === 'ack' && (m as { duplicate: boolean }).duplicate)).toMatchObject({ seq: 0, duplicate: true });
        expect(await store.windows(run.id)).toEqual(ws);
        expect(server.counters).toMatchObject({ batchesIngested: 1, duplicateBatches: 1 });
        expect(server.counters.pointsIngested).toBeGreaterThan(0);
        c.ws.close();
      });

      it('answers bad messages with coded errors and stays open', async () => {
        const { ws: base, store } = await serve();
        const c = await client(`${base}/ingest`);
        const run = fakeRun({ id: 'remote-2' });
        const bad: [string | Buffer, string][] = [
          ['{not json', 'TIDEMARK_ERR_MESSAGE_INVALID'],
          [Buffer.from([1, 2, 3]), 'TIDEMARK_ERR_MESSAGE_INVALID'],
          [encodeJson({ v: 2, type: 'batch', run: 'r', seq: 0, records: [] }), 'TIDEMARK_ERR_MESSAGE_INVALID'],
          [encodeJson({ v: 1, type: 'batch', run: 'r', seq: -1, records: [] }), 'TIDEMARK_ERR_MESSAGE_INVALID'],
          [encodeJson({ v: 1, type: 'batch', run: 'r', seq: 1e300, records: [] }), 'TIDEMARK_ERR_MESSAGE_INVALID'],
          ['{"v":1,"type":"batch","run":"r","seq":0,"records":[{"type":"run","__proto__":{"polluted":true}}]}', 'TIDEMARK_ERR_MESSAGE_INVALID'],
          [batch(run.id, 0, [{ type: 'window', window: fakeWindows(run, 1)[0]! }]), 'TIDEMARK_ERR_RUN_NOT_FOUND'],
          [batch(run.id, 0, [{ type: 'run', run: { ...run, tags: { a: 1 } } as never }]), 'TIDEMARK_ERR_RECORD_INVALID'],
        ];
        for (const [i, [msg, code]] of bad.entries()) {
          c.ws.send(msg, { binary: Buffer.isBuffer(msg) });
          const reply = await c.next((m) => m.type === 'error' && c.got.filter((g) => g.type === 'error').indexOf(m) === i);
          expect(reply, `message ${i}`).toMatchObject({ type: 'error', code, retry: false });
        }
        expect(({} as Record<string, unknown>).polluted).toBeUndefined();
        expect(await store.runs()).toEqual([]);
        expect(c.ws.readyState).toBe(WebSocket.OPEN);
        c.ws.close();
      });

      it('limits the batch rate per connection and says when to retry', async () => {
        const { ws: base } = await serve({ ingestRate: 2 });
        const c = await client(`${base}/ingest`);
        for (let i = 0; i < 6; i++) c.ws.send(encodeJson({ v: 1, type: 'batch', run: 'r', seq: i, records: [] }));
        const limited = await c.next((m) => m.type === 'error' && (m as { code: string }).code === 'TIDEMARK_ERR_RATE_LIMITED');
        expect(limited).toMatchObject({ retry: true, run: 'r' });
        c.ws.close();
      });

      it('closes a connection whose frame is over the size limit (close code 1009, RFC 6455 §7.4.1)', async () => {
        const { ws: base } = await serve({ maxFrameBytes: 1024 });
        const c = await client(`${base}/ingest`);
        const closed = new Promise<number>((resolve) => c.ws.on('close', (code) => resolve(code)));
        c.ws.send('x'.repeat(4096));
        expect(await closed).toBe(1009);
      });

      it('refuses an upgrade without the token, and one from a page of another origin', async () => {
        const { ws: base } = await serve({ token: 'tok' });
        const status = (url: string, headers: Record<string, string> = {}): Promise<number> =>
          new Promise((resolve) => {
            const ws = new WebSocket(url, { headers });
            ws.on('unexpected-response', (_req, res) => resolve(res.statusCode ?? 0));
            ws.on('open', () => {
              ws.close();
              resolve(101);
            });
            ws.on('error', () => {});
          });
        expect(await status(`${base}/ingest`)).toBe(401);
        expect(await status(`${base}/ingest?token=bad`)).toBe(401);
        expect(await status(`${base}/ingest?token=tok`)).toBe(101);
        expect(await status(`${base}/live?token=tok`, { origin: 'http://evil.test' })).toBe(403);
        expect(await status(`${base}/elsewhere?token=tok`)).toBe(404);
      });

      it('survives a refused upgrade whose client resets the connection while the refusal is sent', async () => {
        const { server, url } = await serve({ token: 'tok-12345678' });
        const port = Number(new URL(url).port);
        const errors: unknown[] = [];
        const onUncaught = (e: unknown): void => void errors.push(e);
        process.on('uncaughtException', onUncaught);
        try {
          for (let i = 0; i < 5; i++) {
            await new Promise<void>((resolve) => {
              const socket = connect(port, '127.0.0.1', () => {
                socket.write('GET /ingest HTTP/1.1\r\nHost: x\r\nUpgrade: websocket\r\nConnection: Upgrade\r\nSec-WebSocket-Key: dGhlIHNhbXBsZSBub25jZQ==\r\nSec-WebSocket-Version: 13\r\n\r\n');
              });
              // On the first bytes of the 401, a reset (RST) instead of a close.
              socket.once('data', () => {
                socket.resetAndDestroy();
                resolve();
              });
              socket.on('error', () => {});
            });
          }
          await new Promise((r) => setTimeout(r, 100));
          expect(errors).toEqual([]);
          expect((await server.app.inject('/healthz')).statusCode).toBe(200);
        } finally {
          process.off('uncaughtException', onUncaught);
        }
      });
    });

    describe('live stream', () => {
      it('backfills a run, then delivers each new window and marker once, in order', async () => {
        const { ws: base, store } = await serve();
        const { run, ws } = await seed(store, 'live-0001', 6);
        const viewer = await client(`${base}/live`);
        viewer.ws.send(encodeJson({ v: 1, type: 'subscribe', run: run.name, points: 4 }));
        const back = (await viewer.next((m) => m.type === 'backfill')) as Extract<LiveMessage, { type: 'backfill' }>;
        expect(back.windows.map((w) => w.index)).toEqual([0, 2, 3, 5]);
        expect(back.total_windows).toBe(6);
        expect(back.markers).toEqual(await store.markers(run.id));

        const more = fakeWindows(run, 9).slice(6);
        const writer = await client(`${base}/ingest`);
        writer.ws.send(batch(run.id, 0, more.map((window): SinkRecord => ({ type: 'window', window }))));
        await writer.next((m) => m.type === 'ack');
        const marker = { run: run.id, layer: 'dense_Dense3', kind: 'compression-start' as const, step: more[1]!.step, detected_step: more[2]!.step, confidence: 0.7, details: {} };
        writer.ws.send(batch(run.id, 1, [{ type: 'marker', marker }, { type: 'window', window: fakeWindows(run, 10)[9]! }]));
        await viewer.next((m) => m.type === 'marker');
        const windows = viewer.got.filter((m) => m.type === 'window').map((m) => (m as Extract<LiveMessage, { type: 'window' }>).window);
        expect(windows.map((w) => w.index)).toEqual([6, 7, 8, 9]);
        expect(windows.slice(0, 3)).toEqual(more);
        expect(viewer.got.filter((m) => m.type === 'marker')).toEqual([{ v: 1, type: 'marker', marker }]);
        expect(ws.length).toBe(6);
        viewer.ws.close();
        writer.ws.close();
      });

      it('delivers a marker stored without any window (an offline analysis writing its markers)', async () => {
        const { ws: base, store } = await serve();
        const { run } = await seed(store, 'alone-0001', 4);
        const viewer = await client(`${base}/live`);
        viewer.ws.send(encodeJson({ v: 1, type: 'subscribe', run: run.id }));
        await viewer.next((m) => m.type === 'backfill');
        const marker = { run: run.id, layer: null, kind: 'diffusion-start' as const, step: 16, detected_step: 32, confidence: 0.9, details: { source: 'offline' } };
        await store.append([{ type: 'marker', marker }]);
        const got = (await viewer.next((m) => m.type === 'marker')) as Extract<ViewerBound, { type: 'marker' }>;
        expect(got.marker).toEqual(marker);
        // The backfill's markers are not sent again.
        expect(viewer.got.filter((m) => m.type === 'marker')).toHaveLength(1);
        viewer.ws.close();
      });

      it('sends windows without per-variable statistics to a viewer that asks so, and whole ones to the others', async () => {
        const { ws: base, store } = await serve();
        const { run, ws } = await seed(store, 'lean-0001', 4);
        const lean = await client(`${base}/live`);
        const whole = await client(`${base}/live`);
        lean.ws.send(encodeJson({ v: 1, type: 'subscribe', run: run.id, variables: false }));
        whole.ws.send(encodeJson({ v: 1, type: 'subscribe', run: run.id }));
        const back = (await lean.next((m) => m.type === 'backfill')) as Extract<ViewerBound, { type: 'backfill' }>;
        expect(back.windows).toEqual(ws.map(withoutVariables));
        await whole.next((m) => m.type === 'backfill');
        const next = fakeWindows(run, 5)[4]!;
        await store.append([{ type: 'window', window: next }]);
        const a = (await lean.next((m) => m.type === 'window')) as Extract<ViewerBound, { type: 'window' }>;
        const b = (await whole.next((m) => m.type === 'window')) as Extract<ViewerBound, { type: 'window' }>;
        expect(a.window).toEqual(withoutVariables(next));
        expect(b.window).toEqual(next);
        expect(Object.keys(b.window.layers[run.layers[0]!.name]!.variables!)).toHaveLength(2);
        lean.ws.close();
        whole.ws.close();
      });

      it('sends the runs list, then each new run and status change', async () => {
        const { ws: base, store } = await serve();
        await seed(store, 'first-0001', 2);
        const viewer = await client(`${base}/live`);
        viewer.ws.send(encodeJson({ v: 1, type: 'subscribe-runs' }));
        const list = (await viewer.next((m) => m.type === 'runs')) as Extract<LiveMessage, { type: 'runs' }>;
        expect(list.runs.map((r) => r.id)).toEqual(['first-0001']);
        await seed(store, 'second-0002', 2);
        // The run may first be seen between its run record and its windows (0 windows), then as it changes.
        const added = (await viewer.next((m) => m.type === 'runs' && (m as typeof list).runs[0]!.id === 'second-0002' && (m as typeof list).runs[0]!.windows === 2)) as typeof list;
        expect(added.runs[0]).toMatchObject({ status: 'running', windows: 2 });
        await store.append([{ type: 'end', run: 'second-0002', status: 'finished', step: 16, time: Date.now() }]);
        const ended = (await viewer.next((m) => m.type === 'runs' && (m as typeof list).runs[0]!.status === 'finished')) as typeof list;
        expect(ended.runs[0]!.id).toBe('second-0002');
        viewer.ws.close();
      });

      it('answers an unknown run and a malformed message with coded errors', async () => {
        const { ws: base } = await serve();
        const viewer = await client(`${base}/live`);
        viewer.ws.send(encodeJson({ v: 1, type: 'subscribe', run: 'no-such-run' }));
        expect(await viewer.next((m) => m.type === 'error')).toMatchObject({ code: 'TIDEMARK_ERR_RUN_NOT_FOUND', run: 'no-such-run', retry: false });
        viewer.ws.send(encodeJson({ v: 1, type: 'subscribe', run: 'x', points: 1 }));
        expect(await viewer.next((m) => m.type === 'error' && (m as { code: string }).code === 'TIDEMARK_ERR_MESSAGE_INVALID')).toBeTruthy();
        viewer.ws.close();
      });
    });
  });
}

describe('buildServer options', () => {
  it('suggests the option meant for a misspelt name, and refuses out-of-range values', async () => {
    const store = openStore(':memory:');
    try {
      await expect(buildServer({ store, ingestRat: 5 } as never)).rejects.toThrow(
        "Unknown option 'ingestRat' of buildServer. Did you mean 'ingestRate'?",
      );
      await expect(buildServer({ store, pollMs: -3 })).rejects.toThrow(
        "Option 'pollMs' of buildServer must be an integer from 1 to 2147483647; received -3.",
      );
      await expect(buildServer({ store: {} as never })).rejects.toThrow(/must be a Store/);
    } finally {
      store.close();
    }
  });
});

describe('favicon', () => {
  it('answers /favicon.ico with the icon the page names inline, without a token', async () => {
    const store = openStore(':memory:');
    const server = await buildServer({ store, token: 'a-long-enough-token', onError: () => {} });
    try {
      const r = await server.app.inject('/favicon.ico');
      expect(r.statusCode).toBe(200);
      expect(r.headers['content-type']).toContain('image/svg+xml');
      expect(r.body).toBe(FAVICON_SVG);
      const html = readFileSync(new URL('../../src/web/index.html', import.meta.url), 'utf8');
      const inline = /<link rel="icon" href="data:image\/svg\+xml,([^"]+)">/.exec(html);
      expect(inline).not.toBeNull();
      expect(decodeURIComponent(inline![1]!).replace(/"/g, "'")).toBe(FAVICON_SVG);
    } finally {
      await server.close();
      store.close();
    }
  });
});
