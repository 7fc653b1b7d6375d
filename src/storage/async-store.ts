/**
 * The asynchronous Store: the same operations as {@link Store}, each answering a Promise, so that a
 * server database (PostgreSQL) can stand behind it as well as the embedded SQLite file. Semantics,
 * errors and codes are those documented on {@link Store}; the conformance suite
 * (test/storage/store-conformance.test.ts) runs the same tests on every implementation.
 */
import type { Marker, RunInfo, SinkRecord, WindowRecord } from '../protocol/records.js';
import type {
  RunDetail,
  RunFilter,
  RunRow,
  SeriesKey,
  SeriesPoint,
  SeriesQuery,
  Store,
  StoredWarning,
  WindowQuery,
} from './store.js';

export interface AsyncStore {
  /** Where the store lives: a file path, ':memory:', or a database URL without its password. */
  readonly path: string;
  /** True when opened read-only: every write rejects with TIDEMARK_ERR_STORE_READONLY. */
  readonly readonly: boolean;
  /** Which implementation: the embedded file or a database server. */
  readonly backend: 'sqlite' | 'postgres';
  beginRun(run: RunInfo): Promise<void>;
  append(records: readonly SinkRecord[]): Promise<void>;
  appendBatch(runId: string, seq: number, records: readonly SinkRecord[]): Promise<{ duplicate: boolean }>;
  heartbeat(runId: string, now?: number): Promise<void>;
  runs(filter?: RunFilter): Promise<RunRow[]>;
  resolveRun(ref: string): Promise<RunDetail>;
  seriesKeys(runId: string): Promise<SeriesKey[]>;
  series(runId: string, metric: string, query?: SeriesQuery): Promise<SeriesPoint[]>;
  markers(runId: string): Promise<Marker[]>;
  markersSince(runId: string, cursor: number): Promise<{ markers: Marker[]; cursor: number }>;
  warnings(runId: string): Promise<StoredWarning[]>;
  windows(runId: string, query?: WindowQuery): Promise<WindowRecord[]>;
  deleteRun(runId: string): Promise<boolean>;
  prune(before: number): Promise<string[]>;
  close(): Promise<void>;
  /**
   * Where the store can tell (PostgreSQL), calls `listener` soon after anything is stored by any process, so a
   * server's viewers need not wait for its next poll; resolves to a function that stops it. Polling stays the
   * guarantee: a listener may miss a change while its connection is re-established.
   */
  onChange?(listener: () => void): Promise<() => Promise<void>>;
}

/**
 * A synchronous store (the SQLite one) seen through the asynchronous interface. Each call runs at once,
 * as before; a thrown error becomes a rejection, so callers handle both backends the same way.
 */
export function asAsyncStore(store: Store): AsyncStore {
  const call =
    <A extends unknown[], R>(fn: (...args: A) => R) =>
    (...args: A): Promise<R> => {
      try {
        return Promise.resolve(fn.apply(store, args));
      } catch (e) {
        return Promise.reject(e as Error);
      }
    };
  return {
    get path() {
      return store.path;
    },
    get readonly() {
      return store.readonly;
    },
    backend: 'sqlite',
    beginRun: call(store.beginRun),
    append: call(store.append),
    appendBatch: call(store.appendBatch),
    heartbeat: call(store.heartbeat),
    runs: call(store.runs),
    resolveRun: call(store.resolveRun),
    seriesKeys: call(store.seriesKeys),
    series: call(store.series),
    markers: call(store.markers),
    markersSince: call(store.markersSince),
    warnings: call(store.warnings),
    windows: call(store.windows),
    deleteRun: call(store.deleteRun),
    prune: call(store.prune),
    close: call(store.close),
  };
}

/** A store of either kind, as callers may hand one in. */
export type AnyStore = Store | AsyncStore;

/** The asynchronous view of any store: an AsyncStore as it is, a synchronous one adapted. */
export function toAsyncStore(store: AnyStore): AsyncStore {
  return 'backend' in store ? store : asAsyncStore(store);
}
