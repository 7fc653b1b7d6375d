/**
 * The SQLite Store (better-sqlite3): runs, their window statistics as series of points, markers and
 * warnings in one local file. Writes are synchronous, one IMMEDIATE transaction per `append`, with
 * every statement prepared once. WAL lets one writer per run and many readers work at once, and
 * several processes write different runs into one file, waiting up to `busyTimeoutMs` for the lock.
 * Every SQLite failure is rethrown as a coded TidemarkError with the original as `cause`: SQLite's
 * own messages can quote SQL and never reach users as they are.
 */
import type Database from 'better-sqlite3';
import { checkOptions, type OptionSchema } from '../option-check.js';
import { TidemarkError, TidemarkTypeError } from '../errors.js';
import type { Marker, RunInfo, SinkRecord, WindowRecord } from '../protocol/records.js';
import { checkBatch, checkRecords, checkRun, show } from './record-check.js';
import { openConnection, wrap } from './sqlite-open.js';
import { SqliteReader } from './sqlite-reader.js';
import { SqliteWriter } from './sqlite-writer.js';
import {
  checkCursor,
  checkFilter,
  checkPruneBefore,
  checkRunRef,
  checkSeriesQuery,
  checkWindowQuery,
} from './store-reading.js';
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

/** Options of {@link openStore}. */
export interface StoreOptions {
  /**
   * Open for reading only: the file must exist and be at the current schema version; writes throw
   * TIDEMARK_ERR_STORE_READONLY. Readers (CLI listings, the server) should use it. Default `false`.
   */
  readonly?: boolean;
  /** A `running` run whose heartbeat is older than this many ms (≥ 0) reads as `interrupted`. Default 30000. */
  staleAfterMs?: number;
  /** How long to wait for another connection's lock before failing, in ms. Default 5000. */
  busyTimeoutMs?: number;
  /** The clock, in ms since the epoch (tests inject one). Default `Date.now`. */
  now?: () => number;
}

const DEFAULTS = { readonly: false, staleAfterMs: 30_000, busyTimeoutMs: 5_000, now: Date.now } as const;

/**
 * Opens (creating it when missing, unless `readonly`) a tidemark store in the SQLite file `path`;
 * `':memory:'` gives a private in-memory store.
 *
 * @throws TidemarkError TIDEMARK_ERR_STORE_OPEN when the file cannot be opened, is not a SQLite file
 *   or belongs to another program; TIDEMARK_ERR_STORE_SCHEMA when it was written by a newer
 *   tidemark. In both cases the file is left untouched.
 */
export function openStore(path: string, options: StoreOptions = {}): SqliteStore {
  return new SqliteStore(path, options);
}

const STORE_RULES: OptionSchema = Object.freeze({
  readonly: { type: 'boolean' },
  // 0 is allowed: every running run then reads as interrupted (a check after the writers are known dead).
  staleAfterMs: { type: 'number', min: 0 },
  busyTimeoutMs: { type: 'number', integer: true, min: 0, max: 2 ** 31 - 1 },
  now: { type: 'function' },
});

function resolveOptions(path: unknown, options: unknown): Required<StoreOptions> {
  if (typeof path !== 'string' || path.length === 0) {
    throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `openStore: path must be a non-empty string; received ${show(path)}.`);
  }
  return checkOptions<Required<StoreOptions>>(options, STORE_RULES, DEFAULTS, { owner: 'openStore' });
}

/**
 * A tidemark store in one SQLite file. Create it with {@link openStore}. It checks arguments and
 * guards every call (closed, read-only); sqlite-open.ts opens the file, SqliteWriter and SqliteReader
 * do the work.
 */
export class SqliteStore implements Store {
  readonly path: string;
  readonly readonly: boolean;
  private db: Database.Database | null;
  private readonly opts: Required<StoreOptions>;
  private readonly writer: SqliteWriter;
  private readonly reader: SqliteReader;

  constructor(path: string, options: StoreOptions = {}) {
    this.opts = resolveOptions(path, options);
    this.path = path;
    this.readonly = this.opts.readonly;
    const conn = openConnection(path, {
      readonly: this.readonly,
      busyTimeoutMs: this.opts.busyTimeoutMs,
      cutoff: () => this.cutoff(),
    });
    this.db = conn.db;
    this.writer = new SqliteWriter(conn, { now: () => this.opts.now(), cutoff: () => this.cutoff() });
    this.reader = new SqliteReader(conn);
  }

  private conn(doing: string): Database.Database {
    if (this.db === null) {
      throw new TidemarkError('TIDEMARK_ERR_STORE_CLOSED', `${doing}: the store ${show(this.path)} was closed. Open it again with openStore().`);
    }
    return this.db;
  }

  private writable(doing: string): void {
    this.conn(doing);
    if (this.readonly) {
      throw new TidemarkError(
        'TIDEMARK_ERR_STORE_READONLY',
        `${doing}: the store ${show(this.path)} was opened read-only. Open it without { readonly: true } to write.`,
      );
    }
  }

  private cutoff(): number {
    return this.opts.now() - this.opts.staleAfterMs;
  }

  /** Runs one writer call (itself one transaction, kept whole or not at all) behind the guards. */
  private write<T>(doing: string, fn: () => T): T {
    this.writable(doing);
    try {
      return fn();
    } catch (e) {
      throw wrap('TIDEMARK_ERR_STORE_WRITE', `${doing}: could not write to ${show(this.path)}; nothing of this call was kept`, e);
    }
  }

  private read<T>(doing: string, fn: () => T): T {
    this.conn(doing);
    try {
      return fn();
    } catch (e) {
      throw wrap('TIDEMARK_ERR_STORE_READ', `${doing}: could not read ${show(this.path)}`, e);
    }
  }

  // -------------------------------------------------------------------------------------------
  // Writing

  beginRun(run: RunInfo): void {
    const checked = checkRun(run);
    this.write('beginRun', () => this.writer.beginRun(checked));
  }

  append(records: readonly SinkRecord[]): void {
    const checked = checkRecords(records);
    this.write('append', () => this.writer.append(checked));
  }

  appendBatch(runId: string, seq: number, records: readonly SinkRecord[]): { duplicate: boolean } {
    checkBatch(runId, seq, records);
    const checked = checkRecords(records);
    return { duplicate: this.write('appendBatch', () => this.writer.appendBatch(runId, seq, checked, records.length)) };
  }

  heartbeat(runId: string, now: number = this.opts.now()): void {
    this.write('heartbeat', () => this.writer.heartbeat(runId, now));
  }

  deleteRun(runId: string): boolean {
    return this.write('deleteRun', () => this.writer.deleteRun(runId));
  }

  prune(before: number): string[] {
    checkPruneBefore(before);
    return this.write('prune', () => this.writer.prune(before));
  }

  close(): void {
    const db = this.db;
    if (db === null) return;
    this.db = null;
    this.writer.forget();
    db.close();
  }

  // -------------------------------------------------------------------------------------------
  // Reading

  runs(filter: RunFilter = {}): RunRow[] {
    const f = checkFilter(filter);
    const cutoff = this.cutoff();
    return this.read('runs', () => this.reader.runs(f, cutoff));
  }

  resolveRun(ref: string): RunDetail {
    checkRunRef(ref);
    return this.read('resolveRun', () => this.reader.resolveRun(ref, this.cutoff()));
  }

  seriesKeys(runId: string): SeriesKey[] {
    return this.read('seriesKeys', () => this.reader.seriesKeys(runId));
  }

  series(runId: string, metric: string, query: SeriesQuery = {}): SeriesPoint[] {
    const q = checkSeriesQuery(metric, query);
    return this.read('series', () => this.reader.series(runId, metric, q));
  }

  markers(runId: string): Marker[] {
    return this.read('markers', () => this.reader.markers(runId));
  }

  markersSince(runId: string, cursor: number): { markers: Marker[]; cursor: number } {
    checkCursor(cursor);
    return this.read('markersSince', () => this.reader.markersSince(runId, cursor));
  }

  warnings(runId: string): StoredWarning[] {
    return this.read('warnings', () => this.reader.warnings(runId));
  }

  windows(runId: string, query: WindowQuery = {}): WindowRecord[] {
    const q = checkWindowQuery(query);
    return this.read('windows', () => this.reader.windows(runId, q));
  }
}
