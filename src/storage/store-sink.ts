/**
 * Feeds a monitor's records into a Store. `write` only queues; `flush` stores the queue in one
 * transaction. A failed flush (disk full, a lock held too long) keeps the records queued and is
 * retried on the next flush; past `maxQueued` the oldest are dropped and counted. A heartbeat marks
 * the run alive, so a run whose process died shows as interrupted.
 */
import { TidemarkTypeError } from '../errors.js';
import { checkOptions, type OptionSchema } from '../option-check.js';
import type { RunInfo, SinkRecord } from '../protocol/records.js';
import { toAsyncStore, type AnyStore, type AsyncStore } from './async-store.js';
import type { Sink } from './sink.js';

export interface StoreSinkOptions {
  /** Milliseconds between heartbeats and background flushes (10 to 2^31 − 1). Default 2000. */
  heartbeatIntervalMs?: number;
  /** Records kept while the store refuses writes. Default 100000. */
  maxQueued?: number;
  /** Told about each failed flush or heartbeat. */
  onError?: (error: unknown) => void;
  /** Close the store when the sink closes. Default true. */
  closeStore?: boolean;
}

const STORE_SINK_RULES: OptionSchema = Object.freeze({
  heartbeatIntervalMs: { type: 'number', integer: true, min: 10, max: 2 ** 31 - 1 },
  maxQueued: { type: 'number', integer: true, min: 1 },
  onError: { type: 'function' },
  closeStore: { type: 'boolean' },
});

export class StoreSink implements Sink {
  private readonly openStore: () => AnyStore | Promise<AnyStore>;
  private store: AsyncStore | null = null;
  /** Appends and heartbeats one after another, in the order they were asked for. */
  private chain: Promise<void> = Promise.resolve();
  private runId: string | null = null;
  private queue: SinkRecord[] = [];
  private timer: NodeJS.Timeout | null = null;
  private droppedCount = 0;
  private readonly heartbeatInterval: number;
  private readonly maxQueued: number;
  private readonly onError: (error: unknown) => void;
  private readonly closeStore: boolean;

  /** `open` is a function so that opening errors surface in `Sink.open`, where the monitor handles them. */
  constructor(openStore: () => AnyStore | Promise<AnyStore>, options: StoreSinkOptions = {}) {
    if (typeof openStore !== 'function') {
      throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', 'new StoreSink(): the first argument must be a function that opens the store.');
    }
    const o = checkOptions<Required<StoreSinkOptions>>(
      options,
      STORE_SINK_RULES,
      { heartbeatIntervalMs: 2000, maxQueued: 100_000, onError: () => {}, closeStore: true },
      { owner: 'new StoreSink()' },
    );
    this.openStore = openStore;
    this.heartbeatInterval = o.heartbeatIntervalMs;
    this.maxQueued = o.maxQueued;
    this.onError = o.onError;
    this.closeStore = o.closeStore;
  }

  get dropped(): number {
    return this.droppedCount;
  }

  async open(run: RunInfo): Promise<void> {
    const store = toAsyncStore(await this.openStore());
    try {
      await store.beginRun(run);
    } catch (e) {
      if (this.closeStore) await store.close().catch(() => undefined);
      throw e;
    }
    this.store = store;
    this.runId = run.id;
    this.timer = setInterval(() => this.tick(), this.heartbeatInterval);
    this.timer.unref();
  }

  write(record: SinkRecord): void {
    // beginRun already stored the run in open().
    if (record.type === 'run') return;
    this.queue.push(record);
    if (this.queue.length > this.maxQueued) {
      const excess = this.queue.length - this.maxQueued;
      this.queue.splice(0, excess);
      this.droppedCount += excess;
    }
  }

  flush(): Promise<void> {
    return this.serial(() => this.flushNow());
  }

  /** Runs `fn` after everything asked for before it; a failure is the caller's, not the next one's. */
  private serial(fn: () => Promise<void>): Promise<void> {
    const next = this.chain.then(fn);
    this.chain = next.catch(() => undefined);
    return next;
  }

  private async flushNow(): Promise<void> {
    const store = this.store;
    if (store === null || this.queue.length === 0) return;
    const batch = this.queue;
    this.queue = [];
    try {
      await store.append(batch);
    } catch (e) {
      // Keep the batch ahead of anything queued meanwhile; the store ignores windows it already has.
      this.queue = batch.concat(this.queue);
      if (this.queue.length > this.maxQueued) {
        const excess = this.queue.length - this.maxQueued;
        this.queue.splice(0, excess);
        this.droppedCount += excess;
      }
      throw e;
    }
  }

  private tick(): void {
    this.serial(async () => {
      await this.flushNow();
      if (this.store !== null && this.runId !== null) await this.store.heartbeat(this.runId);
    }).catch((e: unknown) => this.onError(e));
  }

  async close(): Promise<void> {
    if (this.timer !== null) {
      clearInterval(this.timer);
      this.timer = null;
    }
    await this.chain;
    const store = this.store;
    try {
      // A lock held by another writer usually clears quickly; try a few times before giving up.
      for (let attempt = 0; ; attempt++) {
        try {
          await this.flushNow();
          break;
        } catch (e) {
          if (attempt >= 2) throw e;
          await new Promise((r) => setTimeout(r, 100 * (attempt + 1)));
        }
      }
    } finally {
      this.store = null;
      if (store !== null && this.closeStore) await store.close();
    }
  }
}
