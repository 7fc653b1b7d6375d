/**
 * A remote writer's WebSocket connection to a server's `/ingest` (docs/protocol.md): opened again with
 * backoff whenever it is lost, given up when sent frames get no reply for `ackTimeoutMs`, and each outage
 * reported once. It counts the frames sent and not yet answered on the current connection, and hands
 * on the replies that belong to its run; what to send, and when, is the caller's.
 */
import WebSocket, { type RawData } from 'ws';
import { describeCause, type ErrorCode } from '../errors.js';
import { MAX_FRAME_BYTES } from '../protocol/messages.js';

/** A server that accepts TCP but never answers the upgrade is given up on after this long. */
const HANDSHAKE_TIMEOUT_MS = 10_000;

/** A reply to a batch, read field by field: only trusted as far as its types check out. */
export type LinkReply =
  | { type: 'ack'; seq: number }
  /** `seq` null: the refusal names no batch. `message` is the parsed reply, for the report's cause. */
  | { type: 'error'; seq: number | null; retry: boolean; code: string; text: string; message: Record<string, unknown> };

export interface ServerLinkOptions {
  /** The URL connected to, token included. */
  url: string;
  /** The URL for messages: the token is never repeated in a report. */
  shownUrl: string;
  ackTimeoutMs: number;
  backoff: { initialMs: number; maxMs: number };
  /** Connected (the first time or again): whatever was in flight is gone, send from the oldest. */
  onOpen: () => void;
  /** An ack or error reply about the run (after its seq is no longer counted in flight). */
  onReply: (reply: LinkReply) => void;
  /** The connection is lost; a reconnect follows unless the link is closed. */
  onDown: () => void;
  /** Told of a lost, refused or silent connection: once per outage. */
  report: (code: ErrorCode, message: string, cause?: unknown) => void;
}

/** Doubling delay with jitter (50–100% of it), so writers cut off together do not come back together. */
export function backoffDelay(attempt: number, initialMs: number, maxMs: number, random: () => number = Math.random): number {
  const base = Math.min(maxMs, initialMs * 2 ** Math.min(attempt, 30));
  return base / 2 + (random() * base) / 2;
}

export class ServerLink {
  private readonly o: ServerLinkOptions;
  private run: string | null = null;
  private closed = false;
  private ws: WebSocket | null = null;
  /** Bumped per connection attempt, so events of an old socket are ignored. */
  private connId = 0;
  private reconnectAttempt = 0;
  private reconnectTimer: NodeJS.Timeout | null = null;
  private watchdog: NodeJS.Timeout | null = null;
  /** Since when sent batches have waited without any reply; null while nothing is in flight. */
  private waitingSince: number | null = null;
  private outageReported = false;
  private readonly inflight = new Map<number, number>();
  private inflightBytes = 0;

  constructor(options: ServerLinkOptions) {
    this.o = options;
  }

  /** Connects, for the run whose replies are handed on, and keeps reconnecting until `close`. */
  start(run: string): void {
    this.run = run;
    this.connect();
    this.watchdog = setInterval(() => this.checkAcks(), Math.max(10, Math.floor(this.o.ackTimeoutMs / 4)));
    this.watchdog.unref();
  }

  /** The current connection attempt; what was sent under an earlier one is gone. */
  get connection(): number {
    return this.connId;
  }

  /** Whether `conn` is still the current connection and it is open. */
  isOpen(conn: number): boolean {
    return conn === this.connId && this.ws !== null && this.ws.readyState === WebSocket.OPEN;
  }

  /** Frames sent on this connection and not yet answered. */
  get inFlight(): number {
    return this.inflight.size;
  }

  get inFlightBytes(): number {
    return this.inflightBytes;
  }

  /** Sends batch `seq` on connection `conn`; false (nothing sent) when that is no longer open. */
  send(conn: number, seq: number, bytes: number, text: string): boolean {
    const ws = this.ws;
    if (!this.isOpen(conn) || ws === null) return false;
    if (this.inflight.size === 0) this.waitingSince = Date.now();
    this.inflight.set(seq, bytes);
    this.inflightBytes += bytes;
    // A failed send closes the socket; the batch is resent after reconnecting.
    ws.send(text, () => {});
    return true;
  }

  /** Forgets what is in flight (everything is about to be sent again from the oldest). */
  forgetInFlight(): void {
    this.inflight.clear();
    this.inflightBytes = 0;
  }

  /** Drops the connection at once; it is opened again with backoff. */
  abort(): void {
    this.ws?.terminate();
  }

  /** Delay before attempt `attempt` (from 0) of something retried with this link's backoff. */
  backoff(attempt: number): number {
    return backoffDelay(attempt, this.o.backoff.initialMs, this.o.backoff.maxMs);
  }

  private connect(): void {
    if (this.closed) return;
    const conn = ++this.connId;
    let ws: WebSocket;
    try {
      ws = new WebSocket(this.o.url, { handshakeTimeout: HANDSHAKE_TIMEOUT_MS, maxPayload: MAX_FRAME_BYTES });
    } catch (e) {
      this.lostConnection(conn, e, null, null);
      return;
    }
    this.ws = ws;
    let failure: unknown = null;
    let status: number | null = null;
    // A monitoring connection must not keep a finished process alive; close() holds it open while it waits.
    ws.on('upgrade', (res) => res.socket?.unref());
    ws.on('unexpected-response', (_req, res) => {
      status = res.statusCode ?? null;
      res.resume();
      ws.terminate();
    });
    ws.on('open', () => {
      if (conn !== this.connId) return;
      this.reconnectAttempt = 0;
      this.outageReported = false;
      this.o.onOpen();
    });
    ws.on('message', (data, isBinary) => {
      if (conn === this.connId && !isBinary) this.onMessage(data);
    });
    ws.on('error', (e) => {
      failure = e;
    });
    ws.on('close', (code) => {
      if (conn !== this.connId) return;
      this.lostConnection(conn, failure, status, code);
    });
  }

  private lostConnection(conn: number, failure: unknown, status: number | null, code: number | null): void {
    if (conn !== this.connId) return;
    this.ws = null;
    this.waitingSince = null;
    this.forgetInFlight();
    this.o.onDown();
    if (this.closed) return;
    const { shownUrl } = this.o;
    if (!this.outageReported) {
      this.outageReported = true;
      const kept = 'Records are kept and resent once it answers; retrying with backoff.';
      if (status === 401 || status === 403) {
        this.o.report('TIDEMARK_ERR_UNAUTHORIZED', `${shownUrl} refused the connection (HTTP ${status}): the token is missing or wrong. ${kept}`);
      } else {
        const why = status !== null ? `HTTP ${status}` : failure !== null ? describeCause(failure) : `closed with code ${code ?? '?'}`;
        this.o.report('TIDEMARK_ERR_REMOTE_CONNECT', `Lost or could not open the connection to ${shownUrl} (${why}). ${kept}`, failure ?? undefined);
      }
    }
    if (this.reconnectTimer !== null) return;
    this.reconnectTimer = setTimeout(() => {
      this.reconnectTimer = null;
      this.connect();
    }, this.backoff(this.reconnectAttempt++));
    this.reconnectTimer.unref();
  }

  private checkAcks(): void {
    if (this.waitingSince === null || this.ws === null || this.inflight.size === 0 || Date.now() - this.waitingSince < this.o.ackTimeoutMs) return;
    this.waitingSince = null;
    // Reported as this outage's one report; the close that follows does not report it again.
    if (!this.outageReported) {
      this.outageReported = true;
      this.o.report('TIDEMARK_ERR_REMOTE_CONNECT', `${this.o.shownUrl} did not answer for ${this.o.ackTimeoutMs} ms while batches waited; reconnecting to resend them.`);
    }
    // The close event reconnects, and the caller resends from the oldest unacknowledged batch.
    this.ws.terminate();
  }

  private settle(seq: number): void {
    const bytes = this.inflight.get(seq);
    if (bytes === undefined) return;
    this.inflight.delete(seq);
    this.inflightBytes -= bytes;
  }

  private onMessage(data: RawData): void {
    this.waitingSince = Date.now();
    let msg: unknown;
    try {
      const text = Buffer.isBuffer(data) ? data.toString('utf8') : Array.isArray(data) ? Buffer.concat(data).toString('utf8') : Buffer.from(data).toString('utf8');
      msg = JSON.parse(text);
    } catch {
      return;
    }
    if (typeof msg !== 'object' || msg === null) return;
    // Read field by field: a reply is only trusted as far as its types check out.
    const m = msg as Record<string, unknown>;
    if (m.run !== undefined && m.run !== this.run) return;
    const seq = typeof m.seq === 'number' && Number.isSafeInteger(m.seq) ? m.seq : null;
    if (m.type === 'ack' && seq !== null) {
      this.settle(seq);
      this.o.onReply({ type: 'ack', seq });
    } else if (m.type === 'error') {
      if (seq !== null) this.settle(seq);
      const code = typeof m.code === 'string' ? m.code : 'unknown';
      const text = typeof m.message === 'string' ? m.message : '';
      this.o.onReply({ type: 'error', seq, retry: m.retry === true, code, text, message: m });
    }
  }

  /**
   * Stops for good: no more reconnects or watchdog, and the socket is closed with code 1000, waiting up to
   * `graceMs` for the server's close reply before it is destroyed.
   */
  async close(graceMs: number): Promise<void> {
    this.closed = true;
    if (this.reconnectTimer !== null) clearTimeout(this.reconnectTimer);
    this.reconnectTimer = null;
    if (this.watchdog !== null) clearInterval(this.watchdog);
    this.watchdog = null;
    const ws = this.ws;
    this.ws = null;
    this.connId++;
    if (ws === null || ws.readyState === WebSocket.CLOSED) return;
    const closed = new Promise<void>((resolve) => ws.once('close', () => resolve()));
    if (ws.readyState === WebSocket.OPEN && graceMs > 0) {
      // 1000: normal closure (RFC 6455 §7.4.1).
      ws.close(1000, 'writer closed');
      let timer: NodeJS.Timeout | undefined;
      await Promise.race([closed, new Promise<void>((resolve) => (timer = setTimeout(resolve, graceMs)))]);
      clearTimeout(timer);
    }
    // Also clears ws's own close timer, which would otherwise hold the process for 30 s.
    ws.terminate();
  }
}
