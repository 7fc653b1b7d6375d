import { mkdir, open, type FileHandle } from 'node:fs/promises';
import { dirname } from 'node:path';
import { TidemarkTypeError } from '../errors.js';
import { checkOptions, type OptionSchema } from '../option-check.js';
import type { RunInfo, SinkRecord } from '../protocol/records.js';
import { encodeRecord, type Sink } from './sink.js';

export interface JsonlSinkOptions {
  /** Milliseconds between background flushes (1 to 2^31 − 1). Default 500. */
  flushIntervalMs?: number;
  /** Queued records that trigger a flush at once. Default 256. */
  flushAt?: number;
  /** Records kept in memory while writes fail; older ones are dropped and counted beyond this. Default 100000. */
  maxQueued?: number;
  /** Told once per failed flush. */
  onError?: (error: unknown) => void;
}

const JSONL_SINK_RULES: OptionSchema = Object.freeze({
  flushIntervalMs: { type: 'number', integer: true, min: 1, max: 2 ** 31 - 1 },
  flushAt: { type: 'number', integer: true, min: 1 },
  maxQueued: { type: 'number', integer: true, min: 1 },
  onError: { type: 'function' },
});

/**
 * Appends records to a JSON Lines file (one JSON object per line). Writes are batched on a timer
 * and serialised; a failed write keeps its records queued, up to `maxQueued`.
 */
export class JsonlSink implements Sink {
  readonly path: string;
  private handle: FileHandle | null = null;
  private queue: string[] = [];
  private chain: Promise<void> = Promise.resolve();
  private timer: NodeJS.Timeout | null = null;
  private droppedCount = 0;
  private readonly flushInterval: number;
  private readonly flushAt: number;
  private readonly maxQueued: number;
  private readonly onError: (error: unknown) => void;

  constructor(path: string, options: JsonlSinkOptions = {}) {
    if (typeof path !== 'string' || path.length === 0) {
      throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `new JsonlSink(): path must be a non-empty string; received ${String(path)}.`);
    }
    const o = checkOptions<Required<JsonlSinkOptions>>(
      options,
      JSONL_SINK_RULES,
      { flushIntervalMs: 500, flushAt: 256, maxQueued: 100_000, onError: () => {} },
      { owner: 'new JsonlSink()' },
    );
    this.path = path;
    this.flushInterval = o.flushIntervalMs;
    this.flushAt = o.flushAt;
    this.maxQueued = o.maxQueued;
    this.onError = o.onError;
  }

  get dropped(): number {
    return this.droppedCount;
  }

  async open(run: RunInfo): Promise<void> {
    void run;
    await mkdir(dirname(this.path), { recursive: true });
    this.handle = await open(this.path, 'a');
  }

  write(record: SinkRecord): void {
    this.queue.push(encodeRecord(record));
    if (this.queue.length > this.maxQueued) {
      const excess = this.queue.length - this.maxQueued;
      this.queue.splice(0, excess);
      this.droppedCount += excess;
    }
    if (this.queue.length >= this.flushAt) {
      this.flush().catch(this.onError);
    } else if (this.timer === null) {
      this.timer = setTimeout(() => {
        this.timer = null;
        this.flush().catch(this.onError);
      }, this.flushInterval);
      this.timer.unref();
    }
  }

  flush(): Promise<void> {
    const next = this.chain.then(() => this.writeQueued());
    // Keep the chain alive after a failure so later flushes still run.
    this.chain = next.catch(() => {});
    return next;
  }

  private async writeQueued(): Promise<void> {
    if (this.queue.length === 0) return;
    if (this.handle === null) throw new Error(`JSON Lines file ${this.path} is not open`);
    const batch = this.queue;
    this.queue = [];
    try {
      await this.handle.write(batch.join('\n') + '\n');
    } catch (error) {
      this.queue = batch.concat(this.queue);
      throw error;
    }
  }

  async close(): Promise<void> {
    if (this.timer !== null) {
      clearTimeout(this.timer);
      this.timer = null;
    }
    try {
      await this.flush();
    } finally {
      const handle = this.handle;
      this.handle = null;
      if (handle !== null) await handle.close();
    }
  }
}
