/**
 * RemoteSink against a small ingest server written here on `ws` (loopback only). The fake server stores
 * each (run, seq) once and acknowledges it, as docs/protocol.md asks of the real one; it can hold acks,
 * drop a connection, refuse batches, and be stopped and started again on the same port.
 */
import { spawn } from 'node:child_process';
import { existsSync, mkdtempSync, readFileSync, rmSync } from 'node:fs';
import { createServer, type Server } from 'node:http';
import type { AddressInfo } from 'node:net';
import { tmpdir } from 'node:os';
import { basename, dirname, join } from 'node:path';
import { afterAll, afterEach, describe, expect, it, vi } from 'vitest';
import WebSocket, { WebSocketServer } from 'ws';
import { MAX_FRAME_BYTES, type BatchMessage } from '../../src/protocol/messages.js';
import type { RunInfo, SinkRecord } from '../../src/protocol/records.js';
import { RemoteSink, type RemoteSinkOptions } from '../../src/storage/remote-sink.js';
import { decodeRecord } from '../../src/storage/sink.js';

const dir = mkdtempSync(join(tmpdir(), 'tidemark-remote-'));
afterAll(() => rmSync(dir, { recursive: true, force: true }));

const run: RunInfo = { id: 'run-1', name: 'n', group: null, tags: {}, started_at: 0, config: {}, layers: [] };
const warning = (i: number, message = `m${i}`): SinkRecord => ({ type: 'warning', run: run.id, code: 'X', message, step: i, time: i });
const warnings = (from: number, n: number): SinkRecord[] => Array.from({ length: n }, (_, i) => warning(from + i));
/** Real event-loop time for socket and file I/O while the sink's timers are faked (captured before any faking). */
const realSetTimeout = globalThis.setTimeout;
const realTurns = (ms = 50): Promise<void> => new Promise((r) => realSetTimeout(r, ms));
/** Small delays so reconnects happen within a test's few seconds. */
const FAST = { initialMs: 20, maxMs: 100 };

interface Refusal {
  code: string;
  message: string;
  retry: boolean;
  /** How many more times to refuse this seq. */
  times: number;
}

class FakeIngest {
  port = 0;
  /** seq → records, each seq stored once (the real server's dedupe by (run, seq)). */
  readonly stored = new Map<number, SinkRecord[]>();
  /** Every batch frame received, in arrival order, resends included. */
  readonly frames: { seq: number; records: number; bytes: number }[] = [];
  /** Request URL of every accepted connection. */
  readonly urls: string[] = [];
  /** Close codes the server saw from the writer. */
  readonly closeCodes: number[] = [];
  duplicates = 0;
  holdAcks = false;
  /** Frame index (in `frames`) on which to cut the connection without storing or acking. */
  dropOnFrame: number | null = null;
  readonly refuse = new Map<number, Refusal>();
  /** When set, an upgrade without this `token` query parameter gets HTTP 401. */
  token: string | null = null;
  private http: Server | null = null;
  private wss: WebSocketServer | null = null;
  private held: (() => void)[] = [];

  get url(): string {
    return `ws://127.0.0.1:${this.port}/ingest`;
  }

  async start(): Promise<void> {
    const http = createServer();
    const wss = new WebSocketServer({ noServer: true, maxPayload: MAX_FRAME_BYTES });
    http.on('upgrade', (req, socket, head) => {
      // As the real server does: a client's reset during a refusal must not become an unhandled error here.
      socket.on('error', () => socket.destroy());
      const token = new URL(req.url ?? '/', 'http://localhost').searchParams.get('token');
      if (this.token !== null && token !== this.token) {
        socket.end('HTTP/1.1 401 Unauthorized\r\nContent-Length: 0\r\nConnection: close\r\n\r\n');
        return;
      }
      wss.handleUpgrade(req, socket, head, (ws) => this.serve(ws, req.url ?? ''));
    });
    // Port 0 the first time; the same port again after stop(), as a restarted server would.
    await new Promise<void>((resolve, reject) => {
      http.once('error', reject);
      http.listen(this.port, '127.0.0.1', () => resolve());
    });
    this.port = (http.address() as AddressInfo).port;
    this.http = http;
    this.wss = wss;
  }

  async stop(): Promise<void> {
    const { http, wss } = this;
    this.http = null;
    this.wss = null;
    this.held = [];
    // Stop listening first, so a writer reconnecting at once is refused rather than half-accepted.
    const closed = http === null ? Promise.resolve() : new Promise<void>((resolve) => http.close(() => resolve()));
    if (wss !== null) {
      for (const ws of wss.clients) ws.terminate();
      wss.close();
    }
    http?.closeAllConnections();
    await closed;
  }

  release(): void {
    this.holdAcks = false;
    const held = this.held;
    this.held = [];
    for (const ack of held) ack();
  }

  /** The stored records in seq order; fails unless the seqs run 0, 1, 2, … without a gap. */
  records(): SinkRecord[] {
    const seqs = [...this.stored.keys()].sort((a, b) => a - b);
    expect(seqs).toEqual(seqs.map((_, i) => i));
    return seqs.flatMap((s) => this.stored.get(s) ?? []);
  }

  timesSent(seq: number): number {
    return this.frames.filter((f) => f.seq === seq).length;
  }

  private serve(ws: WebSocket, url: string): void {
    this.urls.push(url);
    ws.on('close', (code) => this.closeCodes.push(code));
    ws.on('message', (data: Buffer) => {
      // decodeRecord's reviver turns "NaN"/"Infinity" back into numbers anywhere in the frame.
      const msg = decodeRecord(data.toString('utf8')) as unknown as BatchMessage;
      const index = this.frames.push({ seq: msg.seq, records: msg.records.length, bytes: data.length }) - 1;
      if (this.dropOnFrame === index) {
        ws.terminate();
        return;
      }
      const refusal = this.refuse.get(msg.seq);
      if (refusal !== undefined && refusal.times > 0) {
        refusal.times--;
        const { code, message, retry } = refusal;
        ws.send(JSON.stringify({ v: 1, type: 'error', code, message, run: msg.run, seq: msg.seq, retry }));
        return;
      }
      const duplicate = this.stored.has(msg.seq);
      if (duplicate) this.duplicates++;
      else this.stored.set(msg.seq, msg.records);
      const ack = () => {
        if (ws.readyState === WebSocket.OPEN) ws.send(JSON.stringify({ v: 1, type: 'ack', run: msg.run, seq: msg.seq, duplicate }));
      };
      if (this.holdAcks) this.held.push(ack);
      else ack();
    });
  }
}

const servers: FakeIngest[] = [];
const sinks: RemoteSink[] = [];
afterEach(async () => {
  vi.useRealTimers();
  await Promise.all(sinks.splice(0).map((s) => s.close()));
  await Promise.all(servers.splice(0).map((s) => s.stop()));
});

async function startServer(): Promise<FakeIngest> {
  const server = new FakeIngest();
  await server.start();
  servers.push(server);
  return server;
}

function makeSink(options: RemoteSinkOptions): RemoteSink {
  const sink = new RemoteSink({ backoff: FAST, spillDir: dir, ...options });
  sinks.push(sink);
  return sink;
}

async function until(condition: () => boolean, what: string, ms = 4000): Promise<void> {
  const end = Date.now() + ms;
  while (!condition()) {
    if (Date.now() > end) throw new Error(`timed out waiting until ${what}`);
    await new Promise((r) => setTimeout(r, 5));
  }
}

const codes = (errors: unknown[]) => errors.map((e) => (e as { code?: string }).code);

describe('RemoteSink', () => {
  it('delivers every record once, in order, in numbered batches, the run record alone in batch 0', async () => {
    const server = await startServer();
    const errors: unknown[] = [];
    const sink = makeSink({ url: server.url, maxBatchRecords: 7, onError: (e) => errors.push(e) });
    await sink.open(run);
    // The monitor writes the run record again after open(); it must not travel twice.
    sink.write({ type: 'run', run });
    const written = [...warnings(0, 49), { type: 'end', run: run.id, status: 'finished', step: Number.NaN, time: Infinity } as SinkRecord];
    for (let i = 0; i < written.length; i += 10) {
      for (const r of written.slice(i, i + 10)) sink.write(r);
      await sink.flush();
    }
    await sink.close();

    const got = server.records();
    expect(got).toEqual([{ type: 'run', run }, ...written]);
    const last = got.at(-1) as Extract<SinkRecord, { type: 'end' }>;
    expect(last.step).toBeNaN();
    expect(last.time).toBe(Infinity);
    // Each flush of 10 records cuts a batch of maxBatchRecords = 7 and one of 3.
    expect([...server.stored.values()].map((r) => r.length)).toEqual([1, 7, 3, 7, 3, 7, 3, 7, 3, 7, 3]);
    expect(server.duplicates).toBe(0);
    expect(sink.dropped).toBe(0);
    expect(sink.unacknowledged).toBe(0);
    expect(errors).toEqual([]);
    // 1000: normal closure (RFC 6455 §7.4.1).
    await until(() => server.closeCodes.length > 0, 'the server saw the close');
    expect(server.closeCodes).toEqual([1000]);
    expect(existsSync(sink.spillPath ?? '')).toBe(false);
  });

  it('cuts batches below 1 MiB, and drops and reports a record larger than a frame', async () => {
    const server = await startServer();
    const errors: unknown[] = [];
    const sink = makeSink({ url: server.url, onError: (e) => errors.push(e) });
    await sink.open(run);
    const big = (i: number) => warning(i, 'x'.repeat(300_000));
    const written = [big(0), big(1), big(2), warning(99, 'y'.repeat(MAX_FRAME_BYTES + 1)), big(3), big(4), big(5), big(6)];
    for (const r of written) sink.write(r);
    await sink.close();

    expect(server.records()).toEqual([{ type: 'run', run }, ...written.filter((r) => r.type === 'warning' && r.step !== 99)]);
    // Three 300 kB records fit under 1 MiB, a fourth would not.
    expect(server.frames.map((f) => f.records)).toEqual([1, 3, 3, 1]);
    for (const f of server.frames) expect(f.bytes).toBeLessThanOrEqual(1024 * 1024);
    expect(sink.dropped).toBe(1);
    expect(codes(errors)).toEqual(['TIDEMARK_ERR_PAYLOAD_TOO_LARGE']);
  });

  it('gathers records written while the server is away into full batches, not one frame per flush', async () => {
    const server = await startServer();
    const sink = makeSink({ url: server.url, maxBatchRecords: 50, closeTimeoutMs: 5000 });
    await sink.open(run);
    await until(() => sink.unacknowledged === 0, 'batch 0 is acknowledged');
    await server.stop();
    // Let the writer see the connection close (a stopped server's close reaches it a moment later).
    await new Promise((r) => setTimeout(r, 200));
    // 120 flushes of one record each, as a monitor flushes after every window.
    const during = warnings(0, 120);
    for (const r of during) {
      sink.write(r);
      await sink.flush();
    }
    await server.start();
    await sink.close();
    expect(server.records()).toEqual([{ type: 'run', run }, ...during]);
    // Batch 0, then ceil(120 / 50) = 3 full batches: 4 seqs, where one batch per flush would make 121.
    expect([...server.stored.keys()].sort((x, y) => x - y)).toEqual([0, 1, 2, 3]);
    expect([...server.stored.values()].map((r) => r.length)).toEqual([1, 50, 50, 20]);
  });

  it('gives up a connection on which batches get no reply, reconnects and resends them', async () => {
    const server = await startServer();
    const errors: unknown[] = [];
    const sink = makeSink({ url: server.url, ackTimeoutMs: 300, closeTimeoutMs: 5000, onError: (e) => errors.push(e) });
    await sink.open(run);
    await until(() => sink.unacknowledged === 0, 'batch 0 is acknowledged');
    // The server stores but never answers: a half-dead peer.
    server.holdAcks = true;
    const recs = warnings(0, 5);
    for (const r of recs) sink.write(r);
    await sink.flush();
    await until(() => server.urls.length === 2, 'a second connection after the ack timeout', 3000);
    server.release();
    await sink.close();
    expect(server.records()).toEqual([{ type: 'run', run }, ...recs]);
    expect(server.timesSent(1)).toBeGreaterThanOrEqual(2);
    expect(sink.dropped).toBe(0);
    expect(codes(errors)).toEqual(['TIDEMARK_ERR_REMOTE_CONNECT']);
    expect(String((errors[0] as Error).message)).toContain('did not answer for 300 ms');
  });

  it('resends unacknowledged batches after a server restart mid-run; none lost, none doubled', async () => {
    const server = await startServer();
    const errors: unknown[] = [];
    const sink = makeSink({ url: server.url, maxBatchRecords: 5, closeTimeoutMs: 5000, onError: (e) => errors.push(e) });
    await sink.open(run);
    await until(() => sink.unacknowledged === 0, 'batch 0 is acknowledged');

    // Batches 1–4 are stored but their acks are lost when the server goes down.
    server.holdAcks = true;
    const before = warnings(0, 20);
    for (const r of before) sink.write(r);
    await sink.flush();
    await until(() => server.stored.size === 5, 'batches 1–4 are stored');
    await server.stop();
    const during = warnings(20, 20);
    for (const r of during) sink.write(r);
    await sink.flush();
    expect(sink.unacknowledged).toBe(40);
    server.holdAcks = false;
    await server.start();
    await sink.close();

    expect(server.records()).toEqual([{ type: 'run', run }, ...before, ...during]);
    for (const seq of [1, 2, 3, 4]) expect(server.timesSent(seq)).toBe(2);
    expect(server.duplicates).toBe(4);
    expect(sink.dropped).toBe(0);
    expect(codes(errors)).toEqual(['TIDEMARK_ERR_REMOTE_CONNECT']);
  });

  it('reconnects after the server cuts the connection, and resends the batch it did not store', async () => {
    const server = await startServer();
    const errors: unknown[] = [];
    server.dropOnFrame = 2;
    const sink = makeSink({ url: server.url, maxBatchRecords: 4, onError: (e) => errors.push(e) });
    await sink.open(run);
    const written = warnings(0, 20);
    for (const r of written) sink.write(r);
    await sink.close();

    expect(server.records()).toEqual([{ type: 'run', run }, ...written]);
    expect(server.frames[2]?.seq).toBe(2);
    expect(server.timesSent(2)).toBe(2);
    expect(server.urls).toHaveLength(2);
    expect(sink.dropped).toBe(0);
    expect(codes(errors)).toEqual(['TIDEMARK_ERR_REMOTE_CONNECT']);
  });

  it('spills to a file past maxMemoryBytes, resends from it, and removes it once all are acknowledged', async () => {
    const server = await startServer();
    const spillDir = join(dir, 'spill');
    const errors: unknown[] = [];
    const sink = makeSink({ url: server.url, maxBatchRecords: 5, maxMemoryBytes: 1, spillDir, onError: (e) => errors.push(e) });
    await sink.open(run);
    await until(() => sink.unacknowledged === 0, 'batch 0 is acknowledged');

    server.holdAcks = true;
    const written = warnings(0, 30);
    for (const r of written) sink.write(r);
    await sink.flush();
    const path = sink.spillPath ?? '';
    expect(dirname(path)).toBe(spillDir);
    expect(basename(path)).toContain(run.id);
    const lines = readFileSync(path, 'utf8').trimEnd().split('\n');
    const spilled = lines.map((l) => decodeRecord(l) as unknown as BatchMessage);
    expect(spilled.map((b) => b.seq)).toEqual([1, 2, 3, 4, 5, 6]);
    expect(spilled.flatMap((b) => b.records)).toEqual(written);

    // Acks lost: after the restart every batch must be read back from the file and sent again.
    await until(() => server.stored.size === 7, 'batches 1–6 are stored');
    await server.stop();
    server.holdAcks = false;
    await server.start();
    await until(() => sink.unacknowledged === 0, 'every batch is acknowledged');
    await until(() => !existsSync(path), 'the spill file is removed');
    await sink.close();

    expect(server.records()).toEqual([{ type: 'run', run }, ...written]);
    for (const seq of [1, 2, 3, 4, 5, 6]) expect(server.timesSent(seq)).toBe(2);
    expect(sink.dropped).toBe(0);
    expect(codes(errors)).toEqual(['TIDEMARK_ERR_REMOTE_CONNECT']);
  });

  it('close() with the server down returns within closeTimeoutMs, counts and reports the unsent records, and keeps them in the spill file', async () => {
    const server = await startServer();
    const url = server.url;
    await server.stop();
    const errors: unknown[] = [];
    const sink = makeSink({ url, closeTimeoutMs: 400, onError: (e) => errors.push(e) });
    // open() must not fail because the server is down: training goes on.
    await sink.open(run);
    const written = warnings(0, 9);
    for (const r of written) sink.write(r);

    // The sink's clock (Date, timers) is faked from here, so the timeout is checked on that clock,
    // not on the shared machine's; socket and file I/O stay real and get real turns to finish.
    vi.useFakeTimers({ toFake: ['Date', 'setTimeout', 'clearTimeout', 'setInterval', 'clearInterval'] });
    let closed = false;
    const closing = sink.close().then(() => (closed = true));
    await vi.advanceTimersByTimeAsync(399);
    await realTurns();
    expect(closed).toBe(false);
    await vi.advanceTimersByTimeAsync(1);
    // Past the timeout the socket gets no grace (deadline − now = 0): what is left is the spill file's I/O.
    for (let i = 0; i < 200 && !closed; i++) await realTurns(5);
    vi.useRealTimers();
    await closing;
    expect(closed).toBe(true);

    expect(sink.dropped).toBe(10);
    expect(codes(errors)).toEqual(['TIDEMARK_ERR_REMOTE_CONNECT', 'TIDEMARK_ERR_REMOTE_UNSENT']);
    const path = sink.spillPath ?? '';
    const unsent = errors[1] as Error;
    expect(unsent.message).toContain('10 records');
    expect(unsent.message).toContain(path);
    const kept = readFileSync(path, 'utf8').trimEnd().split('\n').map((l) => decodeRecord(l) as unknown as BatchMessage);
    expect(kept.map((b) => b.seq)).toEqual([0, 1]);
    expect(kept.flatMap((b) => b.records)).toEqual([{ type: 'run', run }, ...written]);
    rmSync(path);
  });

  it('drops just a batch refused with retry: false, and reports once per server code', async () => {
    const server = await startServer();
    const errors: unknown[] = [];
    for (const seq of [2, 3]) {
      server.refuse.set(seq, { code: 'TIDEMARK_ERR_RECORD_INVALID', message: `record 0 of batch ${seq} lacks a time`, retry: false, times: Infinity });
    }
    const sink = makeSink({ url: server.url, maxBatchRecords: 4, onError: (e) => errors.push(e) });
    await sink.open(run);
    const written = warnings(0, 20);
    for (const r of written) sink.write(r);
    await sink.close();

    expect([...server.stored.keys()].sort((a, b) => a - b)).toEqual([0, 1, 4, 5]);
    expect([...server.stored.values()].flat()).toEqual([{ type: 'run', run }, ...written.slice(0, 4), ...written.slice(12)]);
    expect(server.timesSent(2)).toBe(1);
    expect(server.timesSent(3)).toBe(1);
    expect(sink.dropped).toBe(8);
    expect(codes(errors)).toEqual(['TIDEMARK_ERR_REMOTE_REFUSED']);
    expect((errors[0] as Error).message).toMatch(/TIDEMARK_ERR_RECORD_INVALID: record 0 of batch 2 lacks a time/);
  });

  it('sends a batch refused with retry: true again later, losing nothing', async () => {
    const server = await startServer();
    const errors: unknown[] = [];
    server.refuse.set(1, { code: 'TIDEMARK_ERR_RATE_LIMITED', message: 'slow down', retry: true, times: 2 });
    const sink = makeSink({ url: server.url, maxBatchRecords: 4, onError: (e) => errors.push(e) });
    await sink.open(run);
    const written = warnings(0, 12);
    for (const r of written) sink.write(r);
    await sink.close();

    expect(server.records()).toEqual([{ type: 'run', run }, ...written]);
    expect(server.timesSent(1)).toBe(3);
    expect(sink.dropped).toBe(0);
    expect(errors).toEqual([]);
  });

  it('sends the token as ?token= on /ingest, and reports a refused token without repeating it', async () => {
    const server = await startServer();
    server.token = 'a b&c=d';
    const sink = makeSink({ url: `ws://127.0.0.1:${server.port}`, token: 'a b&c=d' });
    await sink.open(run);
    await sink.close();
    expect(server.records()).toEqual([{ type: 'run', run }]);
    const seen = new URL(server.urls[0] ?? '', 'http://localhost');
    expect(seen.pathname).toBe('/ingest');
    expect(seen.searchParams.get('token')).toBe('a b&c=d');

    const errors: unknown[] = [];
    const wrong = makeSink({ url: server.url, token: 'wrong-token', closeTimeoutMs: 200, onError: (e) => errors.push(e) });
    await wrong.open({ ...run, id: 'run-2' });
    await wrong.close();
    expect(codes(errors)).toEqual(['TIDEMARK_ERR_UNAUTHORIZED', 'TIDEMARK_ERR_REMOTE_UNSENT']);
    expect((errors[0] as Error).message).toContain('HTTP 401');
    for (const e of errors) expect((e as Error).message).not.toContain('wrong-token');
    expect(wrong.dropped).toBe(1);
    rmSync(wrong.spillPath ?? '', { force: true });
  });

  it('throws a coded error at once for a malformed URL', () => {
    // http(s):// is the server's printed address and is accepted (issue 13); other schemes are not.
    for (const url of ['ftp://127.0.0.1:1/ingest', 'localhost:8080', 'ws://', '', 'ws://127.0.0.1:1/ingest#x', 'ws://u:p@127.0.0.1:1/']) {
      let thrown: unknown = null;
      try {
        new RemoteSink({ url });
      } catch (e) {
        thrown = e;
      }
      expect(thrown, url).toBeInstanceOf(TypeError);
      expect(thrown, url).toMatchObject({ code: 'TIDEMARK_ERR_REMOTE_URL' });
    }
    expect(() => new RemoteSink({ url: 'wss://example.invalid:9' })).not.toThrow();
  });

  it('leaves nothing that keeps the process alive: after close with the server down, or when never closed', async () => {
    const server = await startServer();
    const down = await startServer();
    const downUrl = down.url;
    await down.stop();
    // Backoff of seconds: a timer or socket left behind would hold the child far past the limit below.
    const script = (url: string, closeIt: boolean) => `
      import { RemoteSink } from './src/storage/remote-sink.js';
      const sink = new RemoteSink({ url: ${JSON.stringify(url)}, closeTimeoutMs: 300, backoff: { initialMs: 8000, maxMs: 8000 }, spillDir: ${JSON.stringify(dir)} });
      await sink.open({ id: 'child-${closeIt ? 'closed' : 'open'}', name: 'n', group: null, tags: {}, started_at: 0, config: {}, layers: [] });
      if (${closeIt}) { await sink.close(); }
      else { while (sink.unacknowledged > 0) await new Promise((r) => setTimeout(r, 5)); }
      console.log('done ' + sink.dropped);
    `;
    const runChild = (source: string) =>
      new Promise<{ out: string; afterDoneMs: number; code: number | null }>((resolve, reject) => {
        const child = spawn(process.execPath, ['--import', 'tsx', '--input-type=module', '-e', source], { stdio: ['ignore', 'pipe', 'pipe'] });
        let out = '';
        let err = '';
        let doneAt = 0;
        child.stdout.on('data', (d: Buffer) => {
          out += d.toString();
          if (doneAt === 0 && out.includes('done')) doneAt = performance.now();
        });
        child.stderr.on('data', (d: Buffer) => (err += d.toString()));
        const guard = setTimeout(() => child.kill('SIGKILL'), 20_000);
        child.on('error', reject);
        child.on('exit', (code) => {
          clearTimeout(guard);
          if (doneAt === 0) reject(new Error(`child ended (${code}) before it was done: ${err.slice(-2000)}`));
          else resolve({ out: out.trim(), afterDoneMs: performance.now() - doneAt, code });
        });
      });

    const [closed, neverClosed] = await Promise.all([runChild(script(downUrl, true)), runChild(script(server.url, false))]);
    expect(closed).toMatchObject({ out: 'done 1', code: 0 });
    expect(neverClosed).toMatchObject({ out: 'done 0', code: 0 });
    expect(closed.afterDoneMs).toBeLessThan(3000);
    expect(neverClosed.afterDoneMs).toBeLessThan(3000);
    expect(server.stored.get(0)?.[0]).toMatchObject({ type: 'run', run: { id: 'child-open' } });
  });
});

describe('RemoteSink options', () => {
  it('suggests the option meant for a misspelt name, and checks backoff', () => {
    expect(() => new RemoteSink({ url: 'ws://127.0.0.1:1', maxBatchRecord: 5 } as never)).toThrow(
      "Unknown option 'maxBatchRecord' of new RemoteSink(). Did you mean 'maxBatchRecords'?",
    );
    expect(() => new RemoteSink({ url: 'ws://127.0.0.1:1', backoff: { initialMS: 5 } } as never)).toThrow(
      "Unknown option 'backoff.initialMS' of new RemoteSink(). Did you mean 'backoff.initialMs'?",
    );
    expect(() => new RemoteSink({ url: 'ws://127.0.0.1:1', ackTimeoutMs: -1 })).toThrow(/ackTimeoutMs' of new RemoteSink\(\) must be an integer from 1/);
  });

  it("accepts the server's http(s):// address and sends to its /ingest over WebSocket", () => {
    // The address `tidemark serve` prints; the spill path is set at open, so only the URL is observable here.
    expect(() => new RemoteSink({ url: 'http://127.0.0.1:7341' })).not.toThrow();
    expect(() => new RemoteSink({ url: 'https://example.org' })).not.toThrow();
    expect(() => new RemoteSink({ url: 'ftp://example.org' })).toThrow(/has scheme ftp:/);
  });
});
