/**
 * Sends a monitor's records to a tidemark server over WebSocket (`/ingest`, docs/protocol.md). `write`
 * only queues; `flush` cuts the queue into numbered batches and sends them. Every batch is kept until the
 * server acknowledges it, across disconnects: the sink reconnects with backoff and resends what is
 * unacknowledged, in order (the server stores each (run, seq) once). Past `maxMemoryBytes` the oldest
 * batches move to a spill file and are read back from there. Nothing here throws into training: problems
 * go to `onError`, and records given up are counted in `dropped`.
 */
import { mkdir, open, rename, unlink, type FileHandle } from 'node:fs/promises';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import WebSocket, { type RawData } from 'ws';
import { describeCause, TidemarkError, TidemarkRangeError, TidemarkTypeError, type ErrorCode } from '../errors.js';
import { checkOptions, type OptionSchema } from '../option-check.js';
import { MAX_FRAME_BYTES } from '../protocol/messages.js';
import type { RunInfo, SinkRecord } from '../protocol/records.js';
import { encodeRecord, type Sink } from './sink.js';

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

/** A batch is cut at this many encoded bytes (one larger record still travels alone, up to a frame). */
const BATCH_TARGET_BYTES = 1024 * 1024;
/** Sent but unacknowledged on one connection; bounds how much of the spill file is read back at once. */
const MAX_INFLIGHT_BYTES = 4 * 1024 * 1024;
const MAX_INFLIGHT_BATCHES = 32;
/** A server that accepts TCP but never answers the upgrade is given up on after this long. */
const HANDSHAKE_TIMEOUT_MS = 10_000;
/** Longest wait for the server's reply to our close frame before the socket is destroyed. */
const CLOSE_GRACE_MS = 1000;

interface Batch {
  seq: number;
  /** Records in the batch (what `dropped` counts if it is given up). */
  records: number;
  /** UTF-8 bytes of `text`. */
  bytes: number;
  /** The frame, while it is held in memory; null once it lives in the spill file only. */
  text: string | null;
  /** Where the frame is in the spill file, once written there. */
  spill: { offset: number; length: number } | null;
  /** A spill write of this batch is queued. */
  spilling: boolean;
  /** Sent at least once: from then on its seq and content are fixed. */
  sent: boolean;
}

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
  /** The URL connected to, token included. */
  private readonly url: string;
  /** The URL for messages: the token is never repeated in a report. */
  private readonly shownUrl: string;
  private readonly maxBatchRecords: number;
  private readonly maxMemoryBytes: number;
  private readonly spillDir: string;
  private readonly closeTimeoutMs: number;
  private readonly initialMs: number;
  private readonly maxMs: number;
  private readonly flushIntervalMs: number;
  private readonly ackTimeoutMs: number;
  /** Since when sent batches have waited without any reply; null while nothing is in flight. */
  private waitingSince: number | null = null;
  private watchdog: NodeJS.Timeout | null = null;
  private readonly onError: (error: unknown) => void;

  private state: 'new' | 'open' | 'closing' | 'closed' = 'new';
  private closing: Promise<void> | null = null;
  private runId: string | null = null;
  private framePrefix = '';
  private pending: SinkRecord[] = [];
  /** Unacknowledged batches by seq; inserted in seq order, so iteration is oldest first. */
  private readonly batches = new Map<number, Batch>();
  private nextSeq = 0;
  /** Every seq below this is acknowledged or given up. */
  private lowSeq = 0;
  private memBytes = 0;
  private droppedCount = 0;

  private spillFile: string | null = null;
  private spillHandle: FileHandle | null = null;
  private spillEnd = 0;
  private spilledLive = 0;
  /** The last spill file failure, named when close() could not keep the unsent batches. */
  private spillError: unknown = null;
  /** Spill file work runs one step at a time: a read never overtakes the write it depends on. */
  private fileChain: Promise<void> = Promise.resolve();

  private ws: WebSocket | null = null;
  /** Bumped per connection attempt, so events of an old socket are ignored. */
  private connId = 0;
  /** Bumped whenever sending restarts from the oldest batch, so a send loop of an earlier round stops. */
  private round = 0;
  private nextToSend = 0;
  private readonly inflight = new Map<number, number>();
  private inflightBytes = 0;
  private pumping = false;
  private pumpAgain = false;
  /** A `retry: true` refusal holds sending until the retry timer fires. */
  private paused = false;
  private reconnectAttempt = 0;
  private retryAttempt = 0;
  private reconnectTimer: NodeJS.Timeout | null = null;
  private retryTimer: NodeJS.Timeout | null = null;
  private flushTimer: NodeJS.Timeout | null = null;
  private outageReported = false;
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
    this.url = url.href;
    if (url.searchParams.has('token')) url.searchParams.set('token', '***');
    this.shownUrl = url.href;
    this.maxBatchRecords = o.maxBatchRecords;
    this.maxMemoryBytes = o.maxMemoryBytes;
    this.closeTimeoutMs = o.closeTimeoutMs;
    this.initialMs = backoff.initialMs;
    this.maxMs = backoff.maxMs ?? Math.max(10_000, this.initialMs);
    if (this.maxMs < this.initialMs) {
      throw new TidemarkRangeError('TIDEMARK_ERR_OPTION_INVALID', `Option 'backoff.maxMs' of new RemoteSink() must be at least backoff.initialMs (${this.initialMs}); received ${this.maxMs}.`);
    }
    this.flushIntervalMs = o.flushIntervalMs;
    this.ackTimeoutMs = o.ackTimeoutMs;
    this.spillDir = o.spillDir;
    this.onError = o.onError;
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
    let n = this.pending.length;
    for (const b of this.batches.values()) n += b.records;
    return n;
  }

  /** The spill file's path once the run is open. The file exists only while batches are spilled, or after a close that left records unsent. */
  get spillPath(): string | null {
    return this.spillFile;
  }

  /** Queues the run record as batch 0 and starts connecting; resolves at once, whether or not the server answers. */
  async open(run: RunInfo): Promise<void> {
    if (this.state !== 'new') throw new TidemarkError('TIDEMARK_ERR_SINK_OPEN', `RemoteSink.open: the sink is already ${this.state}; use one sink per run.`);
    if (typeof run?.id !== 'string' || run.id.length === 0) {
      throw new TidemarkError('TIDEMARK_ERR_SINK_OPEN', `RemoteSink.open: the run needs a non-empty string id; received ${String(run?.id)}.`);
    }
    this.state = 'open';
    this.runId = run.id;
    this.framePrefix = `{"v":1,"type":"batch","run":${JSON.stringify(run.id)},"seq":`;
    this.spillFile = join(this.spillDir, `tidemark-spill-${run.id.replace(/[^A-Za-z0-9._-]/g, '_').slice(0, 100)}-${process.pid}.jsonl`);
    // Records written before open stay after the run record: the server needs the run first.
    this.pending.unshift({ type: 'run', run });
    this.cutBatches();
    this.connect();
    this.watchdog = setInterval(() => this.checkAcks(), Math.max(10, Math.floor(this.ackTimeoutMs / 4)));
    this.watchdog.unref();
  }

  private checkAcks(): void {
    if (this.waitingSince === null || this.ws === null || this.inflight.size === 0 || Date.now() - this.waitingSince < this.ackTimeoutMs) return;
    this.waitingSince = null;
    // Reported as this outage's one report; the close that follows does not report it again.
    if (!this.outageReported) {
      this.outageReported = true;
      this.emit('TIDEMARK_ERR_REMOTE_CONNECT', `${this.shownUrl} did not answer for ${this.ackTimeoutMs} ms while batches waited; reconnecting to resend them.`);
    }
    // The close event reconnects and resends from the oldest unacknowledged batch.
    this.ws.terminate();
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
    if (this.state === 'new') {
      this.state = 'closed';
      this.droppedCount += this.pending.length;
      this.pending = [];
      return;
    }
    this.state = 'closing';
    await this.flush();
    if (this.batches.size > 0) await this.waitDrained(deadline - Date.now());
    this.state = 'closed';
    this.clearTimers();
    await this.closeSocket(Math.min(CLOSE_GRACE_MS, deadline - Date.now()));

    // Records written during the wait were never batched: batch them so the spill file keeps them too.
    this.cutBatches();
    let unsent = 0;
    for (const b of this.batches.values()) unsent += b.records;
    if (unsent === 0) {
      await this.onFile(() => this.removeSpill());
      return;
    }
    this.droppedCount += unsent;
    const kept = this.batches.size > 0 ? await this.keepUnsent() : null;
    const where =
      kept === null
        ? this.batches.size > 0
          ? `They could not be kept in a file (${describeCause(this.spillError)}).`
          : ''
        : `The unsent batches are in ${kept} (one batch message per line, in seq order): send them with 'tidemark resend ${kept} --to ${this.serverAddress()}' once the server is up, or keep them in a local store with 'tidemark import ${kept}'.`;
    this.batches.clear();
    this.memBytes = 0;
    this.emit(
      'TIDEMARK_ERR_REMOTE_UNSENT',
      `${unsent} records of run ${this.runId ?? '?'} were not acknowledged by ${this.shownUrl} within closeTimeoutMs (${this.closeTimeoutMs} ms) and count as dropped. ${where}`.trim(),
    );
  }

  // -------------------------------------------------------------------------------------------
  // Batching

  private cutBatches(): void {
    if (this.pending.length === 0) return;
    const records = this.pending;
    this.pending = [];
    // A record alone must fit a frame with the envelope around it.
    const limit = MAX_FRAME_BYTES - Buffer.byteLength(this.framePrefix) - 40;
    let parts: string[] = [];
    let partBytes = 0;
    for (const record of records) {
      let text: string;
      try {
        text = encodeRecord(record);
      } catch (e) {
        // A circular or BigInt value in a record (e.g. in a user's config) cannot be sent.
        this.droppedCount++;
        this.report('TIDEMARK_ERR_RECORD_INVALID', `A ${String(record?.type)} record could not be encoded as JSON and was dropped: ${describeCause(e)}`, e);
        continue;
      }
      const bytes = Buffer.byteLength(text);
      if (bytes > limit) {
        this.droppedCount++;
        this.report(
          'TIDEMARK_ERR_PAYLOAD_TOO_LARGE',
          `A ${record.type} record of ${bytes} bytes is larger than a protocol frame (${MAX_FRAME_BYTES} bytes) and was dropped.`,
        );
        continue;
      }
      if (parts.length > 0 && (parts.length >= this.maxBatchRecords || partBytes + bytes + 1 > BATCH_TARGET_BYTES)) {
        this.addBatch(parts);
        parts = [];
        partBytes = 0;
      }
      parts.push(text);
      partBytes += bytes + 1;
    }
    if (parts.length > 0) this.addBatch(parts);
  }

  private addBatch(parts: string[]): void {
    // While the link is down or behind, windows pile up one small batch each; a batch never sent may
    // still grow, so a backlog drains in full batches instead of one frame (and one ack) per window.
    const last = this.batches.get(this.nextSeq - 1);
    if (last !== undefined && !last.sent && last.text !== null && last.spill === null && !last.spilling && last.seq > 0 && last.records + parts.length <= this.maxBatchRecords) {
      const text = `${last.text.slice(0, -2)},${parts.join(',')}]}`;
      const bytes = Buffer.byteLength(text);
      if (bytes <= BATCH_TARGET_BYTES) {
        this.memBytes += bytes - last.bytes;
        last.text = text;
        last.bytes = bytes;
        last.records += parts.length;
        return;
      }
    }
    const seq = this.nextSeq++;
    const text = `${this.framePrefix}${seq},"records":[${parts.join(',')}]}`;
    const bytes = Buffer.byteLength(text);
    this.batches.set(seq, { seq, records: parts.length, bytes, text, spill: null, spilling: false, sent: false });
    this.memBytes += bytes;
  }

  /** Forgets an acknowledged or given-up batch. */
  private removeBatch(batch: Batch): void {
    this.batches.delete(batch.seq);
    if (batch.text !== null) this.memBytes -= batch.bytes;
    if (batch.spill !== null) this.spilledLive--;
    while (this.lowSeq < this.nextSeq && !this.batches.has(this.lowSeq)) this.lowSeq++;
    if (this.spilledLive === 0 && this.spillHandle !== null) void this.onFile(() => this.removeSpill());
    if (this.batches.size === 0) {
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

  // -------------------------------------------------------------------------------------------
  // Spill file

  private onFile<T>(step: () => Promise<T>): Promise<T> {
    const next = this.fileChain.then(step);
    this.fileChain = next.then(
      () => {},
      () => {},
    );
    return next;
  }

  private async spillIfNeeded(): Promise<void> {
    if (this.memBytes <= this.maxMemoryBytes || this.spillFile === null) return;
    const chosen: Batch[] = [];
    let left = this.memBytes;
    for (const b of this.batches.values()) {
      if (left <= this.maxMemoryBytes) break;
      if (b.text === null || b.spilling) continue;
      b.spilling = true;
      chosen.push(b);
      left -= b.bytes;
    }
    if (chosen.length === 0) return;
    const path = this.spillFile;
    try {
      await this.onFile(async () => {
        const live = chosen.filter((b) => this.batches.get(b.seq) === b && b.text !== null);
        if (live.length === 0) return;
        if (this.spillHandle === null) {
          await mkdir(this.spillDir, { recursive: true });
          // Read and write: batches are read back from here to be resent.
          this.spillHandle = await open(path, 'w+');
          this.spillEnd = 0;
        }
        const buf = Buffer.from(live.map((b) => b.text).join('\n') + '\n');
        await this.spillHandle.write(buf, 0, buf.length, this.spillEnd);
        let offset = this.spillEnd;
        this.spillEnd += buf.length;
        for (const b of live) {
          const length = b.bytes;
          // Acknowledged while the write ran: its line is dead weight until the file is removed.
          if (this.batches.get(b.seq) === b && b.text !== null) {
            b.spill = { offset, length };
            b.text = null;
            this.memBytes -= b.bytes;
            this.spilledLive++;
          }
          offset += length + 1;
        }
      });
    } catch (e) {
      // Kept in memory instead: over the bound, but nothing lost. The next flush tries again.
      this.spillError = e;
      this.report('TIDEMARK_ERR_REMOTE_SPILL', `Could not write the spill file ${path}: ${describeCause(e)}. Unacknowledged batches stay in memory.`, e);
    } finally {
      for (const b of chosen) b.spilling = false;
    }
  }

  /** The frame of a spilled batch, or null when it was acknowledged meanwhile or cannot be read (then it is given up). */
  private readSpilled(batch: Batch): Promise<string | null> {
    return this.onFile(async () => {
      if (this.batches.get(batch.seq) !== batch) return null;
      if (batch.text !== null) return batch.text;
      const where = batch.spill;
      const handle = this.spillHandle;
      try {
        if (where === null || handle === null) throw new Error('the batch is not in the spill file');
        const buf = Buffer.alloc(where.length);
        const { bytesRead } = await handle.read(buf, 0, where.length, where.offset);
        if (bytesRead !== where.length) throw new Error(`read ${bytesRead} of ${where.length} bytes at offset ${where.offset}`);
        return buf.toString('utf8');
      } catch (e) {
        this.spillError = e;
        this.droppedCount += batch.records;
        this.removeBatch(batch);
        this.report('TIDEMARK_ERR_REMOTE_SPILL', `Could not read batch ${batch.seq} back from the spill file ${this.spillFile ?? '?'}: ${describeCause(e)}. Its ${batch.records} records were dropped.`, e);
        return null;
      }
    });
  }

  /** Runs on the file chain: deletes the spill file once no unacknowledged batch lives in it. */
  private async removeSpill(): Promise<void> {
    if (this.spilledLive > 0 || this.spillHandle === null) return;
    const handle = this.spillHandle;
    this.spillHandle = null;
    this.spillEnd = 0;
    await handle.close().catch(() => {});
    if (this.spillFile !== null) await unlink(this.spillFile).catch(() => {});
  }

  /** At close: rewrites the spill file to hold exactly the unsent batches, in seq order. Returns its path, or null. */
  private async keepUnsent(): Promise<string | null> {
    const path = this.spillFile;
    if (path === null) return null;
    try {
      return await this.onFile(async () => {
        await mkdir(this.spillDir, { recursive: true });
        const tmp = `${path}.tmp`;
        const out = await open(tmp, 'w');
        try {
          let chunk: string[] = [];
          let chunkBytes = 0;
          for (const b of this.batches.values()) {
            let text = b.text;
            if (text === null) {
              if (b.spill === null || this.spillHandle === null) continue;
              const buf = Buffer.alloc(b.spill.length);
              await this.spillHandle.read(buf, 0, b.spill.length, b.spill.offset);
              text = buf.toString('utf8');
            }
            chunk.push(text);
            chunkBytes += b.bytes;
            if (chunkBytes >= BATCH_TARGET_BYTES) {
              await out.write(chunk.join('\n') + '\n');
              chunk = [];
              chunkBytes = 0;
            }
          }
          if (chunk.length > 0) await out.write(chunk.join('\n') + '\n');
        } finally {
          await out.close();
        }
        if (this.spillHandle !== null) {
          await this.spillHandle.close().catch(() => {});
          this.spillHandle = null;
        }
        await rename(tmp, path);
        return path;
      });
    } catch (e) {
      this.spillError = e;
      return null;
    }
  }

  // -------------------------------------------------------------------------------------------
  // Connection

  private connect(): void {
    if (this.state === 'closed') return;
    const conn = ++this.connId;
    let ws: WebSocket;
    try {
      ws = new WebSocket(this.url, { handshakeTimeout: HANDSHAKE_TIMEOUT_MS, maxPayload: MAX_FRAME_BYTES });
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
      this.restartSending();
    });
    ws.on('message', (data, isBinary) => {
      if (conn === this.connId && !isBinary) this.onReply(data);
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
    this.inflight.clear();
    this.inflightBytes = 0;
    // The reconnect delay stands in for a pending retry delay.
    if (this.retryTimer !== null) clearTimeout(this.retryTimer);
    this.retryTimer = null;
    this.paused = false;
    if (this.state === 'closed') return;
    if (!this.outageReported) {
      this.outageReported = true;
      const kept = 'Records are kept and resent once it answers; retrying with backoff.';
      if (status === 401 || status === 403) {
        this.emit('TIDEMARK_ERR_UNAUTHORIZED', `${this.shownUrl} refused the connection (HTTP ${status}): the token is missing or wrong. ${kept}`);
      } else {
        const why = status !== null ? `HTTP ${status}` : failure !== null ? describeCause(failure) : `closed with code ${code ?? '?'}`;
        this.emit('TIDEMARK_ERR_REMOTE_CONNECT', `Lost or could not open the connection to ${this.shownUrl} (${why}). ${kept}`, failure ?? undefined);
      }
    }
    if (this.reconnectTimer !== null) return;
    this.reconnectTimer = setTimeout(() => {
      this.reconnectTimer = null;
      this.connect();
    }, this.backoff(this.reconnectAttempt++));
    this.reconnectTimer.unref();
  }

  /** Doubling delay with jitter (50–100% of it), so writers cut off together do not come back together. */
  private backoff(attempt: number): number {
    const base = Math.min(this.maxMs, this.initialMs * 2 ** Math.min(attempt, 30));
    return base / 2 + (Math.random() * base) / 2;
  }

  /** Sends every unacknowledged batch again from the oldest. */
  private restartSending(): void {
    this.round++;
    this.paused = false;
    this.nextToSend = this.lowSeq;
    this.inflight.clear();
    this.inflightBytes = 0;
    this.pump();
  }

  private clearTimers(): void {
    for (const t of [this.reconnectTimer, this.retryTimer, this.flushTimer]) if (t !== null) clearTimeout(t);
    this.reconnectTimer = this.retryTimer = this.flushTimer = null;
    if (this.watchdog !== null) clearInterval(this.watchdog);
    this.watchdog = null;
  }

  private async closeSocket(graceMs: number): Promise<void> {
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

  // -------------------------------------------------------------------------------------------
  // Sending and replies

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
        this.ws?.terminate();
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
    const conn = this.connId;
    const round = this.round;
    while (this.canSend(conn, round)) {
      const batch = this.nextBatchToSend();
      if (batch === undefined) return;
      if (this.inflight.size > 0) {
        // Batch 0 carries the run; later batches wait until it is stored, or the server would refuse them.
        if (this.lowSeq === 0) return;
        if (this.inflight.size >= MAX_INFLIGHT_BATCHES || this.inflightBytes + batch.bytes > MAX_INFLIGHT_BYTES) return;
      }
      const text = batch.text ?? (await this.readSpilled(batch));
      if (text === null) {
        this.nextToSend = Math.max(this.nextToSend, batch.seq + 1);
        continue;
      }
      const ws = this.ws;
      if (!this.canSend(conn, round) || ws === null) return;
      this.nextToSend = batch.seq + 1;
      batch.sent = true;
      if (this.inflight.size === 0) this.waitingSince = Date.now();
      this.inflight.set(batch.seq, batch.bytes);
      this.inflightBytes += batch.bytes;
      // A failed send closes the socket; the batch is resent after reconnecting.
      ws.send(text, () => {});
    }
  }

  private canSend(conn: number, round: number): boolean {
    return conn === this.connId && round === this.round && !this.paused && this.ws !== null && this.ws.readyState === WebSocket.OPEN;
  }

  private nextBatchToSend(): Batch | undefined {
    for (let s = Math.max(this.nextToSend, this.lowSeq); s < this.nextSeq; s++) {
      const b = this.batches.get(s);
      if (b !== undefined) {
        this.nextToSend = s;
        return b;
      }
    }
    this.nextToSend = this.nextSeq;
    return undefined;
  }

  private settle(seq: number): void {
    const bytes = this.inflight.get(seq);
    if (bytes === undefined) return;
    this.inflight.delete(seq);
    this.inflightBytes -= bytes;
  }

  private onReply(data: RawData): void {
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
    if (m.run !== undefined && m.run !== this.runId) return;
    const seq = typeof m.seq === 'number' && Number.isSafeInteger(m.seq) ? m.seq : null;
    if (m.type === 'ack' && seq !== null) {
      this.settle(seq);
      this.retryAttempt = 0;
      const batch = this.batches.get(seq);
      if (batch !== undefined) this.removeBatch(batch);
      this.pump();
    } else if (m.type === 'error') {
      if (seq !== null) this.settle(seq);
      if (m.retry === true) {
        this.retryLater();
        return;
      }
      const code = typeof m.code === 'string' ? m.code : 'unknown';
      const text = typeof m.message === 'string' ? m.message : '';
      const batch = seq === null ? undefined : this.batches.get(seq);
      // A late reply about a batch already acknowledged or given up.
      if (seq !== null && batch === undefined) return;
      if (batch !== undefined) {
        this.droppedCount += batch.records;
        this.removeBatch(batch);
      }
      const what = batch !== undefined ? `batch ${batch.seq} (${batch.records} records, dropped)` : 'a message';
      this.reportOnce(`refused:${code}`, 'TIDEMARK_ERR_REMOTE_REFUSED', `${this.shownUrl} refused ${what} of run ${this.runId ?? '?'} for good: ${code}: ${text}`, msg);
      this.pump();
    }
  }

  /** A `retry: true` refusal: stop sending, then after a backoff resend everything unacknowledged from the oldest. */
  private retryLater(): void {
    this.paused = true;
    if (this.retryTimer !== null) return;
    this.retryTimer = setTimeout(() => {
      this.retryTimer = null;
      this.restartSending();
    }, this.backoff(this.retryAttempt++));
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

