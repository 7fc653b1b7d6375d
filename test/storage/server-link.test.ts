/**
 * The server link alone, against a small WebSocket server on loopback: the backoff delays, replies handed
 * on and counted out of flight, an outage reported once and the connection opened again, a refused token,
 * the ack watchdog (on fake timers), and the close handshake.
 */
import { createServer, type Server } from 'node:http';
import type { AddressInfo } from 'node:net';
import { afterEach, describe, expect, it, vi } from 'vitest';
import WebSocket, { WebSocketServer } from 'ws';
import { backoffDelay, ServerLink, type LinkReply, type ServerLinkOptions } from '../../src/storage/server-link.js';

/** Real event-loop time for socket I/O while the watchdog's timers are faked (captured before any faking). */
const realSetTimeout = globalThis.setTimeout;

class Peer {
  port = 0;
  /** Text frames received, per connection in order. */
  readonly received: string[][] = [];
  readonly sockets: WebSocket[] = [];
  readonly closeCodes: number[] = [];
  /** Answers an upgrade with this HTTP status instead of accepting it. */
  refuseWith: number | null = null;
  /** Called for each frame; by default nothing is answered. */
  answer: (ws: WebSocket, text: string) => void = () => {};
  private http: Server | null = null;
  private readonly connected: (() => void)[] = [];

  async start(): Promise<void> {
    const http = createServer();
    const wss = new WebSocketServer({ noServer: true });
    http.on('upgrade', (req, socket, head) => {
      socket.on('error', () => socket.destroy());
      if (this.refuseWith !== null) {
        socket.end(`HTTP/1.1 ${this.refuseWith} Refused\r\nContent-Length: 0\r\nConnection: close\r\n\r\n`);
        return;
      }
      wss.handleUpgrade(req, socket, head, (ws) => {
        const frames: string[] = [];
        this.received.push(frames);
        this.sockets.push(ws);
        ws.on('close', (code) => this.closeCodes.push(code));
        ws.on('message', (data: Buffer) => {
          frames.push(data.toString('utf8'));
          this.answer(ws, data.toString('utf8'));
        });
        for (const f of this.connected.splice(0)) f();
      });
    });
    await new Promise<void>((resolve) => http.listen(0, '127.0.0.1', () => resolve()));
    this.port = (http.address() as AddressInfo).port;
    this.http = http;
  }

  get url(): string {
    return `ws://127.0.0.1:${this.port}/ingest`;
  }

  async stop(): Promise<void> {
    for (const ws of this.sockets) ws.terminate();
    const http = this.http;
    this.http = null;
    http?.closeAllConnections();
    if (http !== null) await new Promise<void>((resolve) => http.close(() => resolve()));
  }
}

/** Resolves when `check` holds, looking after every turn of real I/O; fails the test if that takes over 5 s. */
async function until(check: () => boolean, what: string): Promise<void> {
  for (let i = 0; i < 1000; i++) {
    if (check()) return;
    await new Promise((r) => realSetTimeout(r, 5));
  }
  throw new Error(`never happened: ${what}`);
}

interface Seen {
  opens: number;
  downs: number;
  replies: LinkReply[];
  reports: { code: string; message: string }[];
}

const peers: Peer[] = [];
const links: ServerLink[] = [];
afterEach(async () => {
  vi.useRealTimers();
  await Promise.all(links.splice(0).map((l) => l.close(0)));
  await Promise.all(peers.splice(0).map((p) => p.stop()));
});

async function startPeer(): Promise<Peer> {
  const peer = new Peer();
  await peer.start();
  peers.push(peer);
  return peer;
}

function makeLink(url: string, options: Partial<ServerLinkOptions> = {}): { link: ServerLink; seen: Seen } {
  const seen: Seen = { opens: 0, downs: 0, replies: [], reports: [] };
  const link = new ServerLink({
    url,
    shownUrl: url,
    ackTimeoutMs: 30_000,
    backoff: { initialMs: 10, maxMs: 20 },
    onOpen: () => seen.opens++,
    onReply: (r) => seen.replies.push(r),
    onDown: () => seen.downs++,
    report: (code, message) => seen.reports.push({ code, message }),
    ...options,
  });
  links.push(link);
  return { link, seen };
}

const ackFor = (ws: WebSocket, text: string) => {
  const m = JSON.parse(text) as { run: string; seq: number };
  ws.send(JSON.stringify({ v: 1, type: 'ack', run: m.run, seq: m.seq, duplicate: false }));
};
const frame = (seq: number) => `{"v":1,"type":"batch","run":"r1","seq":${seq},"records":[]}`;

describe('backoffDelay', () => {
  it('doubles from initialMs up to maxMs, jittered to 50–100% of that', () => {
    const bases = [0, 1, 2, 3, 4, 5].map((a) => backoffDelay(a, 100, 1000, () => 1));
    expect(bases).toEqual([100, 200, 400, 800, 1000, 1000]);
    expect([0, 1, 2, 3, 4, 5].map((a) => backoffDelay(a, 100, 1000, () => 0))).toEqual([50, 100, 200, 400, 500, 500]);
    expect(backoffDelay(3, 100, 1000, () => 0.5)).toBe(600);
    // A long outage: the exponent is capped, the delay stays finite.
    expect(backoffDelay(1e9, 250, 10_000, () => 1)).toBe(10_000);
  });
});

describe('ServerLink', () => {
  it('sends frames, counts them in flight until answered, and hands on the replies of its run only', async () => {
    const peer = await startPeer();
    peer.answer = (ws, text) => {
      const m = JSON.parse(text) as { seq: number };
      if (m.seq === 0) ackFor(ws, text);
      if (m.seq === 1) {
        // Not for this link: another run, garbage, a binary frame, a seq that is no integer.
        ws.send(JSON.stringify({ v: 1, type: 'ack', run: 'other', seq: 1 }));
        ws.send('not json');
        ws.send(Buffer.from('{"type":"ack","run":"r1","seq":1}'), { binary: true });
        ws.send(JSON.stringify({ type: 'ack', run: 'r1', seq: 1.5 }));
        ws.send(JSON.stringify({ v: 1, type: 'error', run: 'r1', seq: 1, code: 'BAD', message: 'no', retry: false }));
      }
      if (m.seq === 2) ws.send(JSON.stringify({ v: 1, type: 'error', run: 'r1', seq: 2, code: 'BUSY', retry: true }));
    };
    const { link, seen } = makeLink(peer.url);
    link.start('r1');
    await until(() => seen.opens === 1, 'connected');
    const conn = link.connection;
    expect(link.isOpen(conn)).toBe(true);
    expect(link.send(conn, 0, 100, frame(0))).toBe(true);
    expect(link.inFlight).toBe(1);
    expect(link.inFlightBytes).toBe(100);
    await until(() => seen.replies.length === 1, 'the ack');
    expect(seen.replies[0]).toEqual({ type: 'ack', seq: 0 });
    expect(link.inFlight).toBe(0);
    expect(link.inFlightBytes).toBe(0);

    link.send(conn, 1, 50, frame(1));
    link.send(conn, 2, 70, frame(2));
    expect(link.inFlightBytes).toBe(120);
    await until(() => seen.replies.length === 3, 'two refusals');
    expect(seen.replies.slice(1).map((r) => (r.type === 'error' ? [r.seq, r.code, r.text, r.retry] : r))).toEqual([
      [1, 'BAD', 'no', false],
      [2, 'BUSY', '', true],
    ]);
    expect(link.inFlight).toBe(0);
    expect(peer.received).toEqual([[frame(0), frame(1), frame(2)]]);
    expect(seen.reports).toEqual([]);
  });

  it('reports an outage once, forgets what was in flight, and connects again with backoff', async () => {
    const peer = await startPeer();
    const { link, seen } = makeLink(peer.url);
    link.start('r1');
    await until(() => seen.opens === 1, 'connected');
    link.send(link.connection, 0, 10, frame(0));
    peer.sockets[0]!.terminate();
    await until(() => seen.opens === 2, 'connected again');
    expect(seen.downs).toBe(1);
    expect(link.inFlight).toBe(0);
    expect(seen.reports.map((r) => r.code)).toEqual(['TIDEMARK_ERR_REMOTE_CONNECT']);
    expect(seen.reports[0]!.message).toContain(`Lost or could not open the connection to ${peer.url}`);
    // A frame sent on the old connection cannot go out on the new one.
    expect(link.send(link.connection - 1, 1, 10, frame(1))).toBe(false);
    expect(link.send(link.connection, 1, 10, frame(1))).toBe(true);
    await until(() => peer.received[1]?.length === 1, 'the frame on the second connection');
    expect(peer.received[1]).toEqual([frame(1)]);
    // Connected again: the next outage is reported again.
    peer.sockets[1]!.terminate();
    await until(() => seen.opens === 3, 'connected a third time');
    expect(seen.reports.map((r) => r.code)).toEqual(['TIDEMARK_ERR_REMOTE_CONNECT', 'TIDEMARK_ERR_REMOTE_CONNECT']);
  });

  it('names a refused token as such, without the token', async () => {
    const peer = await startPeer();
    peer.refuseWith = 401;
    const { link, seen } = makeLink(`${peer.url}?token=secret`, { shownUrl: `${peer.url}?token=***` });
    link.start('r1');
    await until(() => seen.downs >= 2, 'two refused attempts');
    expect(seen.opens).toBe(0);
    expect(seen.reports).toHaveLength(1);
    expect(seen.reports[0]!.code).toBe('TIDEMARK_ERR_UNAUTHORIZED');
    expect(seen.reports[0]!.message).toContain('(HTTP 401)');
    expect(seen.reports[0]!.message).not.toContain('secret');
  });

  it('gives up a connection whose frames get no reply for ackTimeoutMs, and not one that answers', async () => {
    vi.useFakeTimers({ toFake: ['Date', 'setInterval', 'clearInterval'] });
    const peer = await startPeer();
    const held: (() => void)[] = [];
    peer.answer = (ws, text) => held.push(() => ackFor(ws, text));
    const { link, seen } = makeLink(peer.url, { ackTimeoutMs: 1000 });
    link.start('r1');
    await until(() => seen.opens === 1, 'connected');
    link.send(link.connection, 0, 10, frame(0));
    link.send(link.connection, 1, 10, frame(1));
    await until(() => held.length === 2, 'both frames arrived');
    vi.advanceTimersByTime(750);
    held.shift()!();
    await until(() => seen.replies.length === 1, 'one ack');
    // 1500 ms since the first send, but only 750 since the last reply.
    vi.advanceTimersByTime(750);
    expect(seen.reports).toEqual([]);
    expect(seen.opens).toBe(1);
    vi.advanceTimersByTime(500);
    expect(seen.reports.map((r) => r.message)).toEqual([`${peer.url} did not answer for 1000 ms while batches waited; reconnecting to resend them.`]);
    await until(() => seen.opens === 2, 'connected again');
    expect(seen.downs).toBe(1);
    // The close that followed was not reported a second time.
    expect(seen.reports).toHaveLength(1);
    expect(link.inFlight).toBe(0);
    // Nothing in flight: silence is no reason to give up.
    vi.advanceTimersByTime(5000);
    expect(seen.reports).toHaveLength(1);
    expect(seen.opens).toBe(2);
  });

  it('closes with code 1000 and connects no more', async () => {
    const peer = await startPeer();
    const { link, seen } = makeLink(peer.url);
    link.start('r1');
    await until(() => seen.opens === 1, 'connected');
    const conn = link.connection;
    await link.close(1000);
    await until(() => peer.closeCodes.length === 1, 'the server saw the close');
    expect(peer.closeCodes).toEqual([1000]);
    expect(link.isOpen(conn)).toBe(false);
    expect(link.send(link.connection, 0, 10, frame(0))).toBe(false);
    // Closed by us: not an outage.
    expect(seen.reports).toEqual([]);
  });
});
