/**
 * 10,000 generated bad messages and requests against one server: malformed and truncated JSON, wrong
 * types, huge numbers, prototype-pollution keys, unknown runs, replayed sequences, bad tokens, oversized
 * payloads. The server must stay up, answer each one with a code, store nothing invalid, and keep its
 * memory bounded. Seeded, so a failure replays.
 */
import type { AddressInfo } from 'node:net';
import { afterAll, beforeAll, describe, expect, it } from 'vitest';
import WebSocket from 'ws';
import type { SinkRecord } from '../../src/protocol/records.js';
import { buildServer, type TidemarkServer } from '../../src/server/app.js';
import { decodeJson, encodeJson } from '../../src/storage/sink.js';
import { openStore, type SqliteStore } from '../../src/storage/sqlite-store.js';
import { mulberry32 } from '../helpers/random.js';
import { fakeRun, fakeWindows } from '../helpers/window-records.js';

const TOKEN = 'fuzz-token-123';
let server: TidemarkServer;
let store: SqliteStore;
let base: string;

beforeAll(async () => {
  store = openStore(':memory:');
  server = await buildServer({ store, token: TOKEN, maxFrameBytes: 64 * 1024, ingestRate: 1e6, pollMs: 50, onError: () => {} });
  await server.app.listen({ host: '127.0.0.1', port: 0 });
  base = `127.0.0.1:${(server.app.server.address() as AddressInfo).port}`;
});
afterAll(async () => {
  await server.close();
  store.close();
});

const rng = mulberry32(20261202);
const pick = <T>(xs: readonly T[]): T => xs[Math.floor(rng() * xs.length)]!;

const good = fakeRun({ id: 'fuzz-good-run' });
const goodWindows = fakeWindows(good, 3);

/** One bad ingest message, as text. Each kind is a way a writer (or an attacker) gets it wrong. */
function badIngest(i: number): string {
  const valid = encodeJson({ v: 1, type: 'batch', run: good.id, seq: 1000 + i, records: [{ type: 'window', window: goodWindows[0] }] });
  const kinds: (() => string)[] = [
    () => valid.slice(0, Math.floor(rng() * (valid.length - 1))), // truncated
    () => `${valid}}`,
    () => encodeJson({ v: 1, type: 'batch', run: good.id, seq: pick([-1, 1.5, 2 ** 60, '3', null, 1e308]), records: [] }),
    () => encodeJson({ v: pick([0, 2, '1', null]), type: 'batch', run: good.id, seq: i, records: [] }),
    () => encodeJson({ v: 1, type: pick(['batches', '', 'ack', 'subscribe', 7]), run: good.id, seq: i, records: [] }),
    () => encodeJson({ v: 1, type: 'batch', run: pick(['', 'x'.repeat(500), 42, null]), seq: i, records: [] }),
    () => encodeJson({ v: 1, type: 'batch', run: good.id, seq: i, records: pick([null, {}, 'records', [1, 2], [{}], [{ type: 'nope' }]]) }),
    () => `{"v":1,"type":"batch","run":"${good.id}","seq":${i},"records":[{"type":"window","window":{"__proto__":{"admin":true}}}]}`,
    () => `{"__proto__":{"polluted":1},"v":1}`,
    () => encodeJson({ v: 1, type: 'batch', run: `unknown-${i}`, seq: 0, records: [{ type: 'window', window: { ...goodWindows[0]!, run: `unknown-${i}` } }] }),
    () =>
      encodeJson({
        v: 1,
        type: 'batch',
        run: good.id,
        seq: 2000 + i,
        records: [{ type: 'window', window: { ...goodWindows[0]!, index: 50 + i, step: pick([-5, 1e300, Number.NaN, 'ten']), layers: pick([[], 'x', { a: 'b' }]) } }],
      }),
    () => encodeJson({ v: 1, type: 'batch', run: good.id, seq: 3000 + i, records: [{ type: 'marker', marker: { run: good.id, kind: 'x'.repeat(rng() * 50), step: '1' } }] }),
    () => String.fromCharCode(...Array.from({ length: 1 + Math.floor(rng() * 40) }, () => Math.floor(rng() * 0xd7ff))),
    () => pick(['null', '[]', '"batch"', '1e999', 'true', '{}']),
    () => encodeJson({ v: 1, type: 'batch', run: good.id, seq: i, records: [], extra: { deep: Array.from({ length: 20 }, () => ({ a: [1, 2, 3] })) } }),
  ];
  return pick(kinds)();
}

function connect(path: string, token: string | null): Promise<{ ws: WebSocket; replies: unknown[]; waitFor: (n: number) => Promise<void> }> {
  return new Promise((resolve, reject) => {
    const ws = new WebSocket(`ws://${base}${path}${token === null ? '' : `?token=${token}`}`);
    const replies: unknown[] = [];
    let wanted = Number.POSITIVE_INFINITY;
    let done: (() => void) | null = null;
    ws.on('message', (d) => {
      replies.push(decodeJson(String(d)));
      if (replies.length >= wanted && done !== null) done();
    });
    ws.once('open', () =>
      resolve({
        ws,
        replies,
        waitFor: (n) =>
          new Promise<void>((res, rej) => {
            if (replies.length >= n) return res();
            wanted = n;
            const t = setTimeout(() => rej(new Error(`${replies.length} of ${n} replies`)), 30_000);
            done = () => (clearTimeout(t), res());
          }),
      }),
    );
    ws.once('error', reject);
    ws.once('unexpected-response', (_req, res) => reject(Object.assign(new Error('refused'), { status: res.statusCode })));
  });
}

describe('10,000 bad messages and requests', () => {
  it('answers every one with a code, stays up, stores nothing invalid, keeps its memory bounded', async () => {
    const writer = await connect('/ingest', TOKEN);
    writer.ws.send(encodeJson({ v: 1, type: 'batch', run: good.id, seq: 0, records: [{ type: 'run', run: good }, ...goodWindows.map((window): SinkRecord => ({ type: 'window', window }))] }));
    await writer.waitFor(1);
    expect(writer.replies[0]).toMatchObject({ type: 'ack', seq: 0, duplicate: false });
    global.gc?.();
    const heapBefore = process.memoryUsage().heapUsed;

    let sent = 0;
    const codes = new Map<string, number>();
    // 7000 bad ingest messages on one connection, plus replays of the stored batch.
    const INGEST = 7000;
    for (let i = 0; i < INGEST; i++) {
      if (i % 10 === 0) writer.ws.send(encodeJson({ v: 1, type: 'batch', run: good.id, seq: 0, records: [{ type: 'run', run: good }] }));
      else writer.ws.send(badIngest(i));
      sent++;
    }
    await writer.waitFor(1 + INGEST);
    for (const r of writer.replies.slice(1) as { type: string; code?: string; duplicate?: boolean }[]) {
      const key = r.type === 'ack' ? `ack${r.duplicate ? ' (duplicate)' : ''}` : r.code!;
      codes.set(key, (codes.get(key) ?? 0) + 1);
    }
    expect(codes.get('ack (duplicate)')).toBe(INGEST / 10);
    expect(codes.get('ack') ?? 0).toBe(0);

    // 1500 bad viewer messages.
    const viewer = await connect('/live', TOKEN);
    const VIEWER = 1500;
    for (let i = 0; i < VIEWER; i++) {
      viewer.ws.send(
        pick([
          () => encodeJson({ v: 1, type: 'subscribe', run: `missing-${i}` }),
          () => encodeJson({ v: 1, type: 'subscribe', run: good.id, points: pick([0, 1, -3, 1e9, 'all']) }),
          () => encodeJson({ v: 1, type: pick(['subscribe-all', 'SUBSCRIBE', '']) }),
          () => `{"v":1,"type":"subscribe","run":"${good.id}","__proto__":{"x":1}}`,
          () => '{"v":1,"type":"subscribe"',
        ])(),
      );
      sent++;
    }
    await viewer.waitFor(VIEWER);
    expect((viewer.replies as { type: string }[]).every((r) => r.type === 'error')).toBe(true);

    // 1000 bad HTTP requests.
    const HTTP = 1000;
    for (let i = 0; i < HTTP; i++) {
      const auth = { authorization: `Bearer ${TOKEN}` };
      const [url, headers] = pick([
        () => [`/api/runs/${encodeURIComponent(pick(['nope', '%00', 'x'.repeat(300), '../../etc/passwd']))}`, auth] as const,
        () => [`/api/runs?limit=${pick(['-1', '1e99', 'abc', '0'])}`, auth] as const,
        () => [`/api/runs/${good.id}/series?metric=${pick(['', 'x'.repeat(300)])}&points=${pick(['1', 'many', '-2'])}`, auth] as const,
        () => [`/api/runs/${good.id}/export?format=${pick(['xml', '', 'csv;drop'])}`, auth] as const,
        () => ['/api/runs', { authorization: pick(['Bearer wrong', 'Basic abc', '', `Bearer ${TOKEN}x`]) }] as const,
        () => [`/api/runs?__proto__[x]=1&constructor=2`, auth] as const,
        () => [`/api/${pick(['run', 'runs/x/y/z', 'admin'])}`, auth] as const,
      ])();
      const r = await server.app.inject({ url, headers });
      expect(r.statusCode, url).toBeGreaterThanOrEqual(400);
      const code = (r.json() as { error?: { code?: string } }).error?.code;
      expect(code, url).toMatch(/^TIDEMARK_ERR_/);
      expect(r.body).not.toMatch(/SQLITE|at \/|node_modules/);
      codes.set(`http ${code!}`, (codes.get(`http ${code!}`) ?? 0) + 1);
      sent++;
    }

    // 300 upgrades with bad tokens, and 200 oversized frames (each closes its connection with 1009).
    for (let i = 0; i < 300; i++) {
      const e = await connect(pick(['/ingest', '/live']), pick([null, 'wrong', `${TOKEN}0`])).catch((err: { status?: number }) => err);
      expect((e as { status?: number }).status).toBe(401);
      sent++;
    }
    for (let i = 0; i < 200; i++) {
      const c = await connect('/ingest', TOKEN);
      const closed = new Promise<number>((resolve) => c.ws.on('close', (code) => resolve(code)));
      c.ws.send('x'.repeat(64 * 1024 + 1 + Math.floor(rng() * 1000)));
      expect(await closed).toBe(1009);
      sent++;
    }
    expect(sent).toBe(10_000);

    // Still up, nothing invalid stored, memory bounded.
    expect((await server.app.inject('/healthz')).statusCode).toBe(200);
    expect(store.runs().map((r) => r.id)).toEqual([good.id]);
    expect(store.windows(good.id)).toEqual(goodWindows);
    expect(({} as Record<string, unknown>).polluted ?? ({} as Record<string, unknown>).admin).toBeUndefined();
    global.gc?.();
    const grown = process.memoryUsage().heapUsed - heapBefore;
    // Generous: the replies and codes collected by this test are themselves a few MB.
    expect(grown).toBeLessThan(64 * 1024 * 1024);
    console.log(`fuzz: ${[...codes].map(([k, n]) => `${k} ${n}`).join(', ')}; heap grew ${(grown / 2 ** 20).toFixed(1)} MiB`);
    writer.ws.close();
    viewer.ws.close();
  }, 120_000);
});
