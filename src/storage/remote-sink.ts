/**
 * Sends a monitor's records to a tidemark server over WebSocket (`/ingest`, docs/protocol.md). `write`
 * only queues; `flush` cuts the queue into numbered batches and sends them. Every batch is kept until the
 * server acknowledges it, across disconnects: the sink reconnects with backoff and resends what is
 * unacknowledged, in order (the server stores each (run, seq) once). Past `maxMemoryBytes` the oldest
 * batches move to a spill file and are read back from there. Nothing here throws into training: problems
 * go to `onError`, and records given up are counted in `dropped`.
 *
 * The parts: the batches and their memory in batch-log.ts, the spill file in spill-file.ts, the connection
 * in server-link.ts. This file decides what is sent when, and what is given up.
 */
import { tmpdir } from 'node:os';
import { describeCause, TidemarkError, TidemarkRangeError, TidemarkTypeError, type ErrorCode } from '../errors.js';
import { checkOptions, type OptionSchema } from '../option-check.js';
import type { RunInfo, SinkRecord } from '../protocol/records.js';
import { BatchLog, type Batch } from './batch-log.js';
import { ServerLink, type LinkReply } from './server-link.js';
import type { Sink } from './sink.js';
import { SpillFile, spillFilePath } from './spill-file.js';

export interface RemoteSinkOptions {
  /** `ws://host:port` or `wss://…`; a URL without a path goes to `/ingest`. */
  url: string;
  /** Sent as the `token` query parameter. */
  token?: string;
  /** Records per batch at most. Default 500. */
  maxBatchRecords?: number;
  /** Unacknowledged batches kept in memory, bytes; older ones go to the spill file. Default 32 MiB. */
  maxMemoryBytes?: number;
  /** Directory of the spill file. Default `os.tmpdir()`. */
  spillDir?: string;
  /** How long `close()` waits for acknowledgements. Default 10000. */
  closeTimeoutMs?: number;
  /** Reconnect and resend delays: doubling from `initialMs` up to `maxMs`, each jittered to 50–100%. */
  backoff?: { initialMs?: number; maxMs?: number };
  /** Milliseconds between background flushes of records written without a flush. Default 1000. */
  flushIntervalMs?: number;
  /**
   * A connection on which sent batches get no reply for this long is given up and opened again (the
   * batches are resent): a server that holds the socket but never answers must not stall the run. Default 30000.
   */
  ackTimeoutMs?: number;
  /** Told about connection failures, refused batches and unsent records; each kind once (see docs/errors.md). */
  onError?: (error: unknown) => void;
}

/** Sent but unacknowledged on one connection; bounds how much of the spill file is read back at once. */
const MAX_INFLIGHT_BYTES = 4 * 1024 * 1024;
const MAX_INFLIGHT_BATCHES = 32;
/** Longest wait for the server's reply to our close frame before the socket is destroyed. */
const CLOSE_GRACE_MS = 1000;

const ms = { type: 'number', integer: true, min: 1, max: 2 ** 31 - 1 } as const;
const REMOTE_SINK_RULES: OptionSchema = Object.freeze({
  url: { type: 'any' },
  token: { type: 'string', nonEmpty: true },
  maxBatchRecords: { type: 'number', integer: true, min: 1, max: Number.MAX_SAFE_INTEGER },
  maxMemoryBytes: { type: 'number', integer: true, min: 0, max: Number.MAX_SAFE_INTEGER },
  spillDir: { type: 'string', nonEmpty: true },
  closeTimeoutMs: { type: 'number', integer: true, min: 0, max: 2 ** 31 - 1 },
  backoff: { type: 'any' },
  flushIntervalMs: ms,
  ackTimeoutMs: ms,
  onError: { type: 'function' },
});
const BACKOFF_RULES: OptionSchema = Object.freeze({ initialMs: ms, maxMs: ms });

export class RemoteSink implements Sink {
  /** The URL for messages: the token is never repeated in a report. */
  private readonly shownUrl: string;
  private readonly maxBatchRecords: number;
  private readonly maxMemoryBytes: number;
  private readonly spillDir: string;
  private readonly closeTimeoutMs: number;
  private readonly flushIntervalMs: number;
  private readonly onError: (error: unknown) => void;
  private readonly link: ServerLink;

  private state: 'new' | 'open' | 'closing' | 'closed' = 'new';
  private closing: Promise<void> | null = null;
  private runId: string | null = null;
  private pending: SinkRecord[] = [];
  /** Both made by open(): frames and the file name carry the run id. */
  private log: BatchLog | null = null;
  private spill: SpillFile | null = null;
  private droppedCount = 0;

  /** Bumped whenever sending restarts from the oldest batch, so a send loop of an earlier round stops. */
  private round = 0;
  private nextToSend = 0;
  private pumping = false;
  private pumpAgain = false;
  /** A `retry: true` refusal holds sending until the retry timer fires. */
  private paused = false;
  private retryAttempt = 0;
  private retryTimer: NodeJS.Timeout | null = null;
  private flushTimer: NodeJS.Timeout | null = null;
  private readonly reported = new Set<string>();
  private drainWaiters: (() => void)[] = [];

  /** Checks the URL and options at once (a coded TypeError/RangeError); connecting waits for `open`. */
  constructor(options: RemoteSinkOptions) {
    if (typeof options !== 'object' || options === null) {
      throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `RemoteSink needs an options object with a url; received ${String(options)}.`);
    }
    const o = checkOptions<Required<Omit<RemoteSinkOptions, 'token' | 'backoff'>> & Pick<RemoteSinkOptions, 'token'>>(
      options,
      REMOTE_SINK_RULES,
      { maxBatchRecords: 500, maxMemoryBytes: 32 * 1024 * 1024, closeTimeoutMs: 10_000, flushIntervalMs: 1000, ackTimeoutMs: 30_000, spillDir: tmpdir(), onError: () => {} },
      { owner: 'new RemoteSink()' },
    );
    const backoff = checkOptions<{ initialMs: number; maxMs?: number }>(options.backoff, BACKOFF_RULES, { initialMs: 250 }, { owner: 'new RemoteSink()', prefix: 'backoff.' });
    const url = parseIngestUrl(options.url);
    if (options.token !== undefined) url.searchParams.set('token', options.token);
    const fullUrl = url.href;
    if (url.searchParams.has('token')) url.searchParams.set('token', '***');
    this.shownUrl = url.href;
    this.maxBatchRecords = o.maxBatchRecords;
    this.maxMemoryBytes = o.maxMemoryBytes;
    this.closeTimeoutMs = o.closeTimeoutMs;
    const initialMs = backoff.initialMs;
    const maxMs = backoff.maxMs ?? Math.max(10_000, initialMs);
    if (maxMs < initialMs) {
      throw new TidemarkRangeError('TIDEMARK_ERR_OPTION_INVALID', `Option 'backoff.maxMs' of new RemoteSink() must be at least backoff.initialMs (${initialMs}); received ${maxMs}.`);
    }
    this.flushIntervalMs = o.flushIntervalMs;
    this.spillDir = o.spillDir;
    this.onError = o.onError;
    this.link = new ServerLink({
      url: fullUrl,
      shownUrl: this.shownUrl,
      ackTimeoutMs: o.ackTimeoutMs,
      backoff: { initialMs, maxMs },
      onOpen: () => this.restartSending(),
      onReply: (reply) => this.onReply(reply),
      onDown: () => {
        // The reconnect delay stands in for a pending retry delay.
        if (this.retryTimer !== null) clearTimeout(this.retryTimer);
        this.retryTimer = null;
        this.paused = false;
      },
      report: (code, message, cause) => this.emit(code, message, cause),
    });
  }

  /** The server's address without the token, for commands to print. */
  private serverAddress(): string {
    const u = new URL(this.shownUrl);
    u.searchParams.delete('token');
    return u.href;
  }

  get dropped(): number {
    return this.droppedCount;
  }

  /** Records written but not yet acknowledged by the server (queued, in flight, or spilled). */
  get unacknowledged(): number {
    return this.pending.length + (this.log?.records ?? 0);
  }

  /** The spill file's path once the run is open. The file exists only while batches are spilled, or after a close that left records unsent. */
  get spillPath(): string | null {
    return this.spill?.path ?? null;
  }

  /** Queues the run record as batch 0 and starts connecting; resolves at once, whether or not the server answers. */
  async open(run: RunInfo): Promise<void> {
    if (this.state !== 'new') throw new TidemarkError('TIDEMARK_ERR_SINK_OPEN', `RemoteSink.open: the sink is already ${this.state}; use one sink per run.`);
    if (typeof run?.id !== 'string' || run.id.length === 0) {
      throw new TidemarkError('TIDEMARK_ERR_SINK_OPEN', `RemoteSink.open: the run needs a non-empty string id; received ${String(run?.id)}.`);
    }
    this.state = 'open';
    this.runId = run.id;
    const log = new BatchLog({
      run: run.id,
      maxBatchRecords: this.maxBatchRecords,
      onDropped: (code, message, cause) => {
        this.droppedCount++;
        this.report(code, message, cause);
      },
    });
    this.log = log;
    this.spill = new SpillFile(spillFilePath(this.spillDir, run.id), this.spillDir, log);
    // Records written before open stay after the run record: the server needs the run first.
    this.pending.unshift({ type: 'run', run });
    this.cutBatches();
    this.link.start(run.id);
  }

  write(record: SinkRecord): void {
    if (this.state === 'closed') {
      this.droppedCount++;
      return;
    }
    // open() already queued the run record; the monitor writes it again.
    const r = record as SinkRecord | null;
    if (r?.type === 'run' && this.runId !== null && r.run?.id === this.runId) return;
    this.pending.push(record);
    if (this.state !== 'open' || this.flushTimer !== null) return;
    const delay = this.pending.length >= this.maxBatchRecords ? 0 : this.flushIntervalMs;
    this.flushTimer = setTimeout(() => {
      this.flushTimer = null;
      this.flush().catch((e: unknown) => this.emit('TIDEMARK_ERR_SINK_WRITE', `RemoteSink background flush failed: ${describeCause(e)}`, e));
    }, delay);
    this.flushTimer.unref();
  }

  /** Cuts what is queued into batches and sends them if connected; resolves once they are held (in memory or spilled), not acknowledged. */
  async flush(): Promise<void> {
    if (this.runId === null || this.state === 'closed') return;
    this.cutBatches();
    this.pump();
    await this.spillIfNeeded();
  }

  /** Flushes, waits up to `closeTimeoutMs` for every acknowledgement, then closes. Reports and counts what stayed unsent. */
  close(): Promise<void> {
    this.closing ??= this.closeNow();
    return this.closing;
  }

  private async closeNow(): Promise<void> {
    const deadline = Date.now() + this.closeTimeoutMs;
    if (this.flushTimer !== null) clearTimeout(this.flushTimer);
    this.flushTimer = null;
    const { log, spill } = this;
    // open() makes the log and spill file as it leaves 'new'.
    if (this.state === 'new' || log === null || spill === null) {
      this.state = 'closed';
      this.droppedCount += this.pending.length;
      this.pending = [];
      return;
    }
    this.state = 'closing';
    await this.flush();
    if (log.size > 0) await this.waitDrained(deadline - Date.now());
    this.state = 'closed';
    this.clearTimers();
    await this.link.close(Math.min(CLOSE_GRACE_MS, deadline - Date.now()));

    // Records written during the wait were never batched: batch them so the spill file keeps them too.
    this.cutBatches();
    const unsent = log.records;
    if (unsent === 0) {
      await spill.removeIfUnused();
      return;
    }
    this.droppedCount += unsent;
    const kept = log.size > 0 ? await spill.keepUnsent() : null;
    const where =
      kept === null
        ? log.size > 0
          ? `They could not be kept in a file (${describeCause(spill.lastError)}).`
          : ''
        : `The unsent batches are in ${kept} (one batch message per line, in seq order): send them with 'tidemark resend ${kept} --to ${this.serverAddress()}' once the server is up, or keep them in a local store with 'tidemark import ${kept}'.`;
    log.clear();
    this.emit(
      'TIDEMARK_ERR_REMOTE_UNSENT',
      `${unsent} records of run ${this.runId ?? '?'} were not acknowledged by ${this.shownUrl} within closeTimeoutMs (${this.closeTimeoutMs} ms) and count as dropped. ${where}`.trim(),
    );
  }

  private clearTimers(): void {
    for (const t of [this.retryTimer, this.flushTimer]) if (t !== null) clearTimeout(t);
    this.retryTimer = this.flushTimer = null;
  }

  // -------------------------------------------------------------------------------------------
  // Batches

  private cutBatches(): void {
    if (this.log === null || this.pending.length === 0) return;
    const records = this.pending;
    this.pending = [];
    this.log.cut(records);
  }

  /** Forgets an acknowledged or given-up batch; the spill file goes once no batch lives in it. */
  private removeBatch(batch: Batch): void {
    const { log, spill } = this;
    if (log === null || spill === null) return;
    log.remove(batch);
    if (log.spilled === 0 && spill.isOpen) void spill.removeIfUnused();
    if (log.size === 0) {
      const waiters = this.drainWaiters;
      this.drainWaiters = [];
      for (const w of waiters) w();
    }
  }

  private waitDrained(ms: number): Promise<void> {
    if (ms <= 0) return Promise.resolve();
    return new Promise((resolve) => {
      // Not unref'd: close() is awaited, and the process should wait for it up to the timeout.
      const timer = setTimeout(done, ms);
      function done(): void {
        clearTimeout(timer);
        resolve();
      }
      this.drainWaiters.push(done);
    });
  }

  private async spillIfNeeded(): Promise<void> {
    const spill = this.spill;
    if (spill === null) return;
    try {
      await spill.spillOver(this.maxMemoryBytes);
    } catch (e) {
      // Kept in memory instead: over the bound, but nothing lost. The next flush tries again.
      this.report('TIDEMARK_ERR_REMOTE_SPILL', `Could not write the spill file ${spill.path}: ${describeCause(e)}. Unacknowledged batches stay in memory.`, e);
    }
  }

  /** The frame of a spilled batch, or null when it was acknowledged meanwhile or cannot be read (then it is given up). */
  private readSpilled(spill: SpillFile, batch: Batch): Promise<string | null> {
    return spill.read(batch, (e) => {
      this.droppedCount += batch.records;
      this.removeBatch(batch);
      this.report('TIDEMARK_ERR_REMOTE_SPILL', `Could not read batch ${batch.seq} back from the spill file ${spill.path}: ${describeCause(e)}. Its ${batch.records} records were dropped.`, e);
    });
  }

  // -------------------------------------------------------------------------------------------
  // Sending and replies

  /** Sends every unacknowledged batch again from the oldest. */
  private restartSending(): void {
    this.round++;
    this.paused = false;
    this.nextToSend = this.log?.lowSeq ?? 0;
    this.link.forgetInFlight();
    this.pump();
  }

  private pump(): void {
    if (this.pumping) {
      this.pumpAgain = true;
      return;
    }
    this.pumping = true;
    void this.pumpLoop()
      .catch((e: unknown) => {
        // Not expected (send and spill reads handle their own failures); start over on a new connection.
        this.reportOnce('pump', 'TIDEMARK_ERR_REMOTE_CONNECT', `Sending to ${this.shownUrl} failed: ${describeCause(e)}. Reconnecting to resend.`, e);
        this.link.abort();
      })
      .finally(() => {
        this.pumping = false;
        if (this.pumpAgain) {
          this.pumpAgain = false;
          this.pump();
        }
      });
  }

  private async pumpLoop(): Promise<void> {
    const { log, spill, link } = this;
    if (log === null || spill === null) return;
    const conn = link.connection;
    const round = this.round;
    while (this.canSend(conn, round)) {
      const batch = log.firstFrom(this.nextToSend);
      this.nextToSend = batch?.seq ?? log.nextSeq;
      if (batch === undefined) return;
      if (link.inFlight > 0) {
        // Batch 0 carries the run; later batches wait until it is stored, or the server would refuse them.
        if (log.lowSeq === 0) return;
        if (link.inFlight >= MAX_INFLIGHT_BATCHES || link.inFlightBytes + batch.bytes > MAX_INFLIGHT_BYTES) return;
      }
      const text = batch.text ?? (await this.readSpilled(spill, batch));
      if (text === null) {
        this.nextToSend = Math.max(this.nextToSend, batch.seq + 1);
        continue;
      }
      if (!this.canSend(conn, round)) return;
      this.nextToSend = batch.seq + 1;
      batch.sent = true;
      link.send(conn, batch.seq, batch.bytes, text);
    }
  }

  private canSend(conn: number, round: number): boolean {
    return round === this.round && !this.paused && this.link.isOpen(conn);
  }

  private onReply(reply: LinkReply): void {
    const log = this.log;
    if (log === null) return;
    if (reply.type === 'ack') {
      this.retryAttempt = 0;
      const batch = log.get(reply.seq);
      if (batch !== undefined) this.removeBatch(batch);
      this.pump();
      return;
    }
    if (reply.retry) {
      this.retryLater();
      return;
    }
    const { seq, code, text } = reply;
    const batch = seq === null ? undefined : log.get(seq);
    // A late reply about a batch already acknowledged or given up.
    if (seq !== null && batch === undefined) return;
    if (batch !== undefined) {
      this.droppedCount += batch.records;
      this.removeBatch(batch);
    }
    const what = batch !== undefined ? `batch ${batch.seq} (${batch.records} records, dropped)` : 'a message';
    this.reportOnce(`refused:${code}`, 'TIDEMARK_ERR_REMOTE_REFUSED', `${this.shownUrl} refused ${what} of run ${this.runId ?? '?'} for good: ${code}: ${text}`, reply.message);
    this.pump();
  }

  /** A `retry: true` refusal: stop sending, then after a backoff resend everything unacknowledged from the oldest. */
  private retryLater(): void {
    this.paused = true;
    if (this.retryTimer !== null) return;
    this.retryTimer = setTimeout(() => {
      this.retryTimer = null;
      this.restartSending();
    }, this.link.backoff(this.retryAttempt++));
    this.retryTimer.unref();
  }

  /** Reports each code once for the sink's life (refusals: once per server code). */
  private report(code: ErrorCode, message: string, cause?: unknown): void {
    this.reportOnce(code, code, message, cause);
  }

  private reportOnce(key: string, code: ErrorCode, message: string, cause?: unknown): void {
    if (this.reported.has(key)) return;
    this.reported.add(key);
    this.emit(code, message, cause);
  }

  private emit(code: ErrorCode, message: string, cause?: unknown): void {
    try {
      this.onError(new TidemarkError(code, message, cause === undefined ? {} : { cause }));
    } catch {
      // A throwing handler must not reach the socket's event handlers.
    }
  }
}

/**
 * The ingest URL for a server address: ws(s)://, or the http(s):// address `serve` prints; path /ingest by
 * default. It needs a host and no fragment (RFC 6455 §3 forbids fragments).
 */
export function parseIngestUrl(raw: unknown): URL {
  const bad = (why: string) =>
    new TidemarkTypeError('TIDEMARK_ERR_REMOTE_URL', `RemoteSink url ${JSON.stringify(raw)} ${why}; expected ws://host:port or wss://host:port, or the server's http(s):// address (path /ingest by default).`);
  if (typeof raw !== 'string') throw bad('is not a string');
  let url: URL;
  try {
    url = new URL(raw);
  } catch {
    throw bad('is not a URL');
  }
  // The server prints its address as http://…; the same host and port take WebSocket ingest.
  if (url.protocol === 'http:' || url.protocol === 'https:') url = new URL(raw.replace(/^http/i, 'ws'));
  if (url.protocol !== 'ws:' && url.protocol !== 'wss:') throw bad(`has scheme ${url.protocol}`);
  if (url.hostname === '') throw bad('has no host');
  if (url.hash !== '' || raw.includes('#')) throw bad('has a fragment (#…), which WebSocket URLs may not carry');
  if (url.username !== '' || url.password !== '') throw bad('carries a user name or password; pass the token option instead');
  if (url.pathname === '/' || url.pathname === '') url.pathname = '/ingest';
  return url;
}

