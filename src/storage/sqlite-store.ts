/**
 * The SQLite Store (better-sqlite3): runs, their window statistics as series of points, markers and
 * warnings in one local file. Writes are synchronous, one IMMEDIATE transaction per `append`, with
 * every statement prepared once. WAL lets one writer per run and many readers work at once, and
 * several processes write different runs into one file, waiting up to `busyTimeoutMs` for the lock.
 * Every SQLite failure is rethrown as a coded TidemarkError with the original as `cause`: SQLite's
 * own messages can quote SQL and never reach users as they are.
 */
import { checkOptions, unknownOption, type OptionSchema } from '../option-check.js';
import { mkdirSync } from 'node:fs';
import { dirname } from 'node:path';
import Database from 'better-sqlite3';
import { lttb } from '../analysis/lttb.js';
import { TidemarkError, TidemarkRangeError, TidemarkTypeError, type ErrorCode } from '../errors.js';
import type {
  LayerInfo,
  LayerStats,
  Marker,
  MarkerKind,
  RunInfo,
  RunStatus,
  SinkRecord,
  VariableStats,
  WindowRecord,
} from '../protocol/records.js';
import { APPLICATION_ID, migrate, readSchemaState, SCHEMA_VERSION } from './schema.js';
import type {
  RunDetail,
  RunFilter,
  RunRow,
  SeriesKey,
  SeriesPoint,
  SeriesQuery,
  SeriesScope,
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

// ---------------------------------------------------------------------------------------------
// JSON columns and numbers

const NON_FINITE: Record<string, number> = { NaN: Number.NaN, Infinity: Infinity, '-Infinity': -Infinity };

/** JSON.stringify, with NaN and ±Infinity as strings, as the JSON Lines sink writes them. */
function toJson(value: unknown): string {
  return JSON.stringify(value, (_k, v: unknown) => (typeof v === 'number' && !Number.isFinite(v) ? String(v) : v));
}

function fromJson<T>(text: string): T {
  return JSON.parse(text, (_k, v: unknown) => (typeof v === 'string' && v in NON_FINITE ? NON_FINITE[v] : v)) as T;
}

/** SQLite turns a bound NaN into NULL anyway; saying so keeps the mapping visible. */
function real(x: number): number | null {
  return Number.isNaN(x) ? null : x;
}

/** The inverse of {@link real} for columns that are never null in the record. */
function num(x: number | null): number {
  return x === null ? Number.NaN : x;
}

// ---------------------------------------------------------------------------------------------
// Validation of options and arguments

function checkKeys(where: string, given: object, known: readonly string[]): void {
  for (const key of Object.keys(given)) if (!known.includes(key)) throw unknownOption(key, known, { owner: where });
}

const STORE_RULES: OptionSchema = Object.freeze({
  readonly: { type: 'boolean' },
  // 0 is allowed: every running run then reads as interrupted (a check after the writers are known dead).
  staleAfterMs: { type: 'number', min: 0 },
  busyTimeoutMs: { type: 'number', integer: true, min: 0, max: 2 ** 31 - 1 },
  now: { type: 'function' },
});

function show(value: unknown): string {
  if (typeof value === 'string') return JSON.stringify(value.length > 60 ? `${value.slice(0, 60)}…` : value);
  if (typeof value === 'number' || typeof value === 'boolean' || value === null || value === undefined) return String(value);
  return Array.isArray(value) ? 'an array' : `a ${typeof value}`;
}

function invalidOption(where: string, name: string, expected: string, got: unknown): TidemarkTypeError {
  return new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `${where}: option '${name}' must be ${expected}; received ${show(got)}.`);
}

function resolveOptions(path: unknown, options: unknown): Required<StoreOptions> {
  if (typeof path !== 'string' || path.length === 0) {
    throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `openStore: path must be a non-empty string; received ${show(path)}.`);
  }
  return checkOptions<Required<StoreOptions>>(options, STORE_RULES, DEFAULTS, { owner: 'openStore' });
}

function badRecord(message: string): TidemarkTypeError {
  return new TidemarkTypeError('TIDEMARK_ERR_RECORD_INVALID', `append: ${message}`);
}

function isObject(x: unknown): x is Record<string, unknown> {
  return typeof x === 'object' && x !== null && !Array.isArray(x);
}

function requireString(what: string, x: unknown): string {
  if (typeof x !== 'string') throw badRecord(`${what} must be a string; received ${show(x)}.`);
  return x;
}

function requireFinite(what: string, x: unknown): number {
  if (typeof x !== 'number' || !Number.isFinite(x)) throw badRecord(`${what} must be a finite number; received ${show(x)}.`);
  return x;
}

function requireNumber(what: string, x: unknown): number {
  if (typeof x !== 'number') throw badRecord(`${what} must be a number (NaN and ±Infinity allowed); received ${show(x)}.`);
  return x;
}

function optionalFinite(what: string, x: unknown): number | null {
  return x === null ? null : requireFinite(what, x);
}

const RUN_STATUSES: readonly RunStatus[] = ['running', 'finished', 'failed', 'interrupted'];

// ---------------------------------------------------------------------------------------------
// SQLite errors → coded errors

const SQLITE_REASONS: [prefix: string, reason: string][] = [
  ['SQLITE_BUSY', 'another connection held the database lock longer than busyTimeoutMs; retry, or raise busyTimeoutMs'],
  ['SQLITE_LOCKED', 'the database was locked; retry'],
  ['SQLITE_FULL', 'the disk is full; free space and retry'],
  ['SQLITE_READONLY', 'the file or its directory cannot be written; check permissions'],
  ['SQLITE_CANTOPEN', 'the file could not be opened; check the path and permissions'],
  ['SQLITE_IOERR', 'an I/O error occurred; check the disk'],
  ['SQLITE_CORRUPT', 'the file is damaged; check it with PRAGMA integrity_check'],
  ['SQLITE_NOTADB', 'the file is not a SQLite database'],
  ['SQLITE_CONSTRAINT', 'a record conflicts with what is stored'],
];

function sqliteCode(e: unknown): string | null {
  return e instanceof Database.SqliteError ? e.code : null;
}

function reasonOf(e: unknown): string {
  const code = sqliteCode(e);
  if (code === null) return e instanceof Error ? e.message : String(e);
  const hit = SQLITE_REASONS.find(([prefix]) => code.startsWith(prefix));
  return `${code}: ${hit === undefined ? 'SQLite reported an error' : hit[1]}`;
}

function wrap(code: ErrorCode, doing: string, e: unknown): Error {
  if (e instanceof TidemarkError || e instanceof TidemarkTypeError || e instanceof TidemarkRangeError) return e;
  return new TidemarkError(code, `${doing} (${reasonOf(e)}).`, { cause: e });
}

// ---------------------------------------------------------------------------------------------
// Row shapes

interface RunDbRow {
  id: string;
  name: string;
  group_name: string | null;
  tags: string;
  status: RunStatus;
  created_at: number;
  ended_at: number | null;
  end_step: number | null;
  heartbeat_at: number;
  last_step: number | null;
  window_count: number;
  config: string;
}

interface WindowDbRow {
  idx: number;
  first_step: number;
  step: number;
  epoch: number | null;
  batches: number;
  batch_size: number | null;
  batches_per_epoch: number | null;
  pass_batches: string;
  snr_floor: number | null;
  time: number;
  noise: string | null;
}

interface SeriesDbRow {
  id: number;
  scope: SeriesScope;
  layer: string | null;
  variable: string | null;
  metric: string;
}

interface MarkerDbRow {
  layer: string | null;
  kind: MarkerKind;
  step: number | null;
  detected_step: number | null;
  confidence: number | null;
  details: string;
}

/** Series ids of one run, by scope, so a point costs two Map lookups rather than a query. */
interface RunSeriesIds {
  network: Map<string, number>;
  run: Map<string, number>;
  layer: Map<string, Map<string, number>>;
  variable: Map<string, Map<string, number>>;
}

/** Window fields that read as run-level series, served from the windows table. */
const WINDOW_SERIES = ['snr_floor', 'epoch', 'batch_size'] as const;
/** Layer and network statistics a record carries as null (not yet estimable) rather than leaving out. */
const NULLABLE_METRICS: ReadonlySet<string> = new Set(['noise_scale', 'travel_exponent']);
type WindowSeries = (typeof WINDOW_SERIES)[number];

const RUN_COLUMNS =
  'id, name, group_name, tags, status, created_at, ended_at, end_step, heartbeat_at, last_step, window_count, config';
/** The stored status, or `interrupted` for a running run whose writer stopped heartbeating. */
const STATUS_EXPR = "CASE WHEN status = 'running' AND heartbeat_at < @cutoff THEN 'interrupted' ELSE status END";

const SERIES_QUERY_KEYS = ['layer', 'from', 'to', 'points', 'last'] as const;
const FILTER_KEYS = ['name', 'group', 'tags', 'status', 'limit'] as const;

type Stmt = Database.Statement<unknown[], unknown>;

/** A tidemark store in one SQLite file. Create it with {@link openStore}. */
export class SqliteStore implements Store {
  readonly path: string;
  readonly readonly: boolean;
  private db: Database.Database | null;
  private readonly opts: Required<StoreOptions>;
  private readonly st: Record<string, Stmt> = {};
  private readonly dynamic = new Map<string, Stmt>();
  private readonly seriesIds = new Map<string, RunSeriesIds>();
  /** Series created by the transaction in progress: forgotten again if it rolls back. */
  private created: { runId: string; scope: SeriesScope; owner: string | null; metric: string }[] = [];
  private readonly inTransaction: (fn: () => void) => void;
  private readonly inSnapshot: <T>(fn: () => T) => T;

  constructor(path: string, options: StoreOptions = {}) {
    this.opts = resolveOptions(path, options);
    this.path = path;
    this.readonly = this.opts.readonly;
    this.db = this.open();
    const tx = this.db.transaction((fn: () => unknown) => fn());
    // IMMEDIATE takes the write lock up front, so a busy writer is waited for (busy_timeout) instead of
    // failing when a read transaction tries to upgrade.
    this.inTransaction = (fn) => tx.immediate(fn);
    // A read of several statements (a run's windows) sees one snapshot, never a writer's later commit.
    this.inSnapshot = <T>(fn: () => T): T => tx.deferred(fn) as T;
    try {
      this.prepareStatements();
    } catch (e) {
      this.close();
      throw wrap('TIDEMARK_ERR_STORE_OPEN', `openStore: could not read the schema of ${show(path)}`, e);
    }
    if (!this.readonly) this.persistInterrupted();
  }

  private get memory(): boolean {
    return this.path === ':memory:';
  }

  private open(): Database.Database {
    const { readonly, busyTimeoutMs } = this.opts;
    const where = `openStore: could not open ${show(this.path)}`;
    let db: Database.Database;
    try {
      if (!readonly && !this.memory) mkdirSync(dirname(this.path), { recursive: true });
      db = new Database(this.path, { readonly, fileMustExist: readonly, timeout: busyTimeoutMs });
    } catch (e) {
      throw new TidemarkError('TIDEMARK_ERR_STORE_OPEN', `${where} (${reasonOf(e)}).`, { cause: e });
    }
    try {
      // Reading the header first proves the file is SQLite before anything could write to it.
      const state = readSchemaState(db);
      const foreign =
        state.applicationId !== APPLICATION_ID && (state.applicationId !== 0 || state.version !== 0 || state.objects !== 0);
      if (foreign) {
        throw new TidemarkError(
          'TIDEMARK_ERR_STORE_OPEN',
          `${where}: it is a SQLite database of another program (application_id ${state.applicationId}, ${state.objects} schema objects), not a tidemark store. It was left untouched; use another file name.`,
        );
      }
      if (state.version > SCHEMA_VERSION) {
        throw new TidemarkError(
          'TIDEMARK_ERR_STORE_SCHEMA',
          `${where}: its schema version is ${state.version}, newer than ${SCHEMA_VERSION}, the newest this tidemark knows. It was left untouched; upgrade tidemark to read it.`,
        );
      }
      if (readonly && state.version < SCHEMA_VERSION) {
        throw new TidemarkError(
          state.version === 0 ? 'TIDEMARK_ERR_STORE_OPEN' : 'TIDEMARK_ERR_STORE_SCHEMA',
          state.version === 0
            ? `${where}: it is an empty file, not a tidemark store yet. Write a run to it first.`
            : `${where}: its schema version ${state.version} needs an upgrade to ${SCHEMA_VERSION}, which a read-only open cannot do. Open it once writable.`,
        );
      }
      if (!readonly) {
        if (!this.memory && db.pragma('journal_mode', { simple: true }) !== 'wal') db.pragma('journal_mode = WAL');
        // NORMAL in WAL mode: a commit survives a process crash; only a power loss can undo the last ones.
        db.pragma('synchronous = NORMAL');
        db.pragma('foreign_keys = ON');
        if (state.version < SCHEMA_VERSION) migrate(db);
      }
      return db;
    } catch (e) {
      db.close();
      if (e instanceof TidemarkError) throw e;
      throw new TidemarkError('TIDEMARK_ERR_STORE_OPEN', `${where} (${reasonOf(e)}).`, { cause: e });
    }
  }

  private prepareStatements(): void {
    const db = this.conn('open');
    const p = (name: string, sql: string): void => {
      this.st[name] = db.prepare(sql);
    };
    p('insertRun', `INSERT INTO runs (id, name, group_name, tags, status, created_at, heartbeat_at, config)
      VALUES (?, ?, ?, ?, 'running', ?, ?, ?) ON CONFLICT (id) DO NOTHING`);
    p('touchRun', `UPDATE runs SET heartbeat_at = ?,
      status = CASE WHEN status = 'interrupted' AND ended_at IS NULL THEN 'running' ELSE status END WHERE id = ?`);
    p('insertLayer', 'INSERT INTO layers (run_id, position, name, class_name, params, variables) VALUES (?, ?, ?, ?, ?, ?)');
    p('insertWindow', `INSERT INTO windows (run_id, idx, first_step, step, epoch, batches, batch_size, batches_per_epoch,
      pass_batches, snr_floor, time, noise) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?) ON CONFLICT (run_id, idx) DO NOTHING`);
    p('countWindows', `UPDATE runs SET window_count = window_count + ?, last_step = max(ifnull(last_step, ?), ?),
      heartbeat_at = max(heartbeat_at, ?),
      status = CASE WHEN status = 'interrupted' AND ended_at IS NULL THEN 'running' ELSE status END WHERE id = ?`);
    p('findSeries', `SELECT id FROM series WHERE run_id = ? AND metric = ? AND scope = ?
      AND ifnull(layer, '') = ? AND ifnull(variable, '') = ?`);
    p('insertSeries', 'INSERT INTO series (run_id, scope, layer, variable, metric) VALUES (?, ?, ?, ?, ?)');
    p('insertPoint', 'INSERT INTO points (series_id, step, value) VALUES (?, ?, ?)');
    p('insertMarker', `INSERT INTO markers (run_id, layer, kind, step, detected_step, confidence, details)
      VALUES (?, ?, ?, ?, ?, ?, ?) ON CONFLICT DO NOTHING`);
    p('insertWarning', `INSERT INTO warnings (run_id, code, message, step, time) VALUES (?, ?, ?, ?, ?) ON CONFLICT DO NOTHING`);
    p('endRun', 'UPDATE runs SET status = ?, ended_at = ?, end_step = ? WHERE id = ?');
    p('markInterrupted', "UPDATE runs SET status = 'interrupted' WHERE status = 'running' AND heartbeat_at < ?");
    p('anyStale', "SELECT 1 FROM runs WHERE status = 'running' AND heartbeat_at < ? LIMIT 1");
    p('runById', `SELECT ${RUN_COLUMNS}, ${STATUS_EXPR} AS status FROM runs WHERE id = @ref`);
    p('runsByPrefix', `SELECT ${RUN_COLUMNS}, ${STATUS_EXPR} AS status FROM runs WHERE substr(id, 1, length(@ref)) = @ref
      ORDER BY created_at DESC, id LIMIT 11`);
    p('runsByName', `SELECT ${RUN_COLUMNS}, ${STATUS_EXPR} AS status FROM runs WHERE name = @ref
      ORDER BY created_at DESC, id LIMIT 11`);
    p('runsLike', `SELECT ${RUN_COLUMNS}, ${STATUS_EXPR} AS status FROM runs WHERE instr(lower(name), lower(@ref)) > 0
      ORDER BY created_at DESC, id LIMIT 5`);
    p('runsRecent', `SELECT ${RUN_COLUMNS}, ${STATUS_EXPR} AS status FROM runs ORDER BY created_at DESC, id LIMIT 5`);
    p('runExists', 'SELECT 1 FROM runs WHERE id = ?');
    p('layersOf', 'SELECT name, class_name, params, variables FROM layers WHERE run_id = ? ORDER BY position');
    p('seriesOf', 'SELECT id, scope, layer, variable, metric FROM series WHERE run_id = ? ORDER BY id');
    p('seriesFor', 'SELECT id, scope, layer, variable, metric FROM series WHERE run_id = ? AND metric = ?');
    // A series is read one column at a time: better-sqlite3 builds no row object or array per point
    // then, which halves the time of a million-point read (bench/store.ts, table 4).
    p('stepsRange', 'SELECT step FROM points WHERE series_id = ? AND step >= ? AND step <= ? ORDER BY step');
    p('valuesRange', 'SELECT value FROM points WHERE series_id = ? AND step >= ? AND step <= ? ORDER BY step');
    p('pointsAll', 'SELECT step, value FROM points WHERE series_id = ?');
    p('lastRange', 'SELECT step, value FROM points WHERE series_id = ? AND step >= ? AND step <= ? ORDER BY step DESC LIMIT ?');
    p('pointsAt', 'SELECT step, value FROM points WHERE series_id = ? AND step IN (SELECT value FROM json_each(?))');
    for (const col of WINDOW_SERIES) {
      // Column names come from the constant list above, never from input.
      p(`window_${col}`, `SELECT step, ${col} AS value FROM windows WHERE run_id = ? AND step >= ? AND step <= ? ORDER BY step`);
    }
    p('hasWindows', 'SELECT 1 FROM windows WHERE run_id = ? LIMIT 1');
    p('windowsOf', `SELECT idx, first_step, step, epoch, batches, batch_size, batches_per_epoch, pass_batches, snr_floor, time, noise
      FROM windows WHERE run_id = ? ORDER BY step`);
    p('windowsRange', `SELECT idx, first_step, step, epoch, batches, batch_size, batches_per_epoch, pass_batches, snr_floor, time, noise
      FROM windows WHERE run_id = ? AND step >= ? AND step <= ? ORDER BY step`);
    p('windowStepsRange', 'SELECT step FROM windows WHERE run_id = ? AND step >= ? AND step <= ? ORDER BY step');
    p('windowsAt', `SELECT idx, first_step, step, epoch, batches, batch_size, batches_per_epoch, pass_batches, snr_floor, time, noise
      FROM windows WHERE run_id = ? AND step IN (SELECT value FROM json_each(?)) ORDER BY step`);
    p('markersOf', `SELECT layer, kind, step, detected_step, confidence, details FROM markers WHERE run_id = ?
      ORDER BY step, detected_step, id`);
    p('markersSince', `SELECT id, layer, kind, step, detected_step, confidence, details FROM markers WHERE run_id = ? AND id > ?
      ORDER BY id`);
    p('warningsOf', 'SELECT code, message, step, time FROM warnings WHERE run_id = ? ORDER BY time, id');
    p('deletePoints', 'DELETE FROM points WHERE series_id IN (SELECT id FROM series WHERE run_id = ?)');
    p('deleteRun', 'DELETE FROM runs WHERE id = ?');
    p('findBatch', 'SELECT 1 FROM ingest_batches WHERE run_id = ? AND seq = ?');
    p('insertBatch', 'INSERT INTO ingest_batches (run_id, seq, records, received_at) VALUES (?, ?, ?, ?)');
    p('runExists', 'SELECT 1 FROM runs WHERE id = ?');
    p('pruneCandidates', `SELECT id FROM runs WHERE created_at < ?
      AND NOT (status = 'running' AND heartbeat_at >= ?) ORDER BY created_at`);
    // Series reads return [step, value] arrays: a million small objects would cost more than the read.
    for (const name of ['pointsAll', 'pointsAt', 'lastRange', ...WINDOW_SERIES.map((c) => `window_${c}`)]) this.st[name]!.raw(true);
    for (const name of ['stepsRange', 'valuesRange', 'windowStepsRange']) this.st[name]!.pluck(true);
  }

  private conn(doing: string): Database.Database {
    if (this.db === null) {
      throw new TidemarkError('TIDEMARK_ERR_STORE_CLOSED', `${doing}: the store ${show(this.path)} was closed. Open it again with openStore().`);
    }
    return this.db;
  }

  private stmt(name: string): Stmt {
    return this.st[name]!;
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

  /** Runs `fn` as one write transaction; on failure nothing of it stays, in the file or in the series cache. */
  private write(doing: string, fn: () => void): void {
    this.writable(doing);
    this.created = [];
    try {
      this.inTransaction(fn);
    } catch (e) {
      for (const c of this.created) this.forgetSeries(c.runId, c.scope, c.owner, c.metric);
      throw wrap('TIDEMARK_ERR_STORE_WRITE', `${doing}: could not write to ${show(this.path)}; nothing of this call was kept`, e);
    } finally {
      this.created = [];
    }
  }

  private read<T>(doing: string, fn: () => T): T {
    this.conn(doing);
    try {
      return this.inSnapshot(fn);
    } catch (e) {
      throw wrap('TIDEMARK_ERR_STORE_READ', `${doing}: could not read ${show(this.path)}`, e);
    }
  }

  /** Persists `interrupted` for runs whose writer stopped heartbeating; reads derive it anyway. */
  private persistInterrupted(): void {
    const cutoff = this.cutoff();
    try {
      if (this.stmt('anyStale').get(cutoff) === undefined) return;
      this.inTransaction(() => this.stmt('markInterrupted').run(cutoff));
    } catch (e) {
      // Another writer holding the lock must not stop this open; the next one will try again.
      if (sqliteCode(e)?.startsWith('SQLITE_BUSY')) return;
      this.close();
      throw wrap('TIDEMARK_ERR_STORE_OPEN', `openStore: could not update ${show(this.path)}`, e);
    }
  }

  // -------------------------------------------------------------------------------------------
  // Writing

  beginRun(run: RunInfo): void {
    this.write('beginRun', () => this.insertRun(run));
  }

  append(records: readonly SinkRecord[]): void {
    if (!Array.isArray(records)) throw badRecord(`expected an array of records; received ${show(records)}.`);
    this.write('append', () => this.appendRecords(records));
  }

  appendBatch(runId: string, seq: number, records: readonly SinkRecord[]): { duplicate: boolean } {
    if (typeof runId !== 'string' || runId.length === 0) throw badRecord(`appendBatch: run must be a non-empty string; received ${show(runId)}.`);
    if (!Number.isSafeInteger(seq) || seq < 0) throw badRecord(`appendBatch: seq must be an integer ≥ 0; received ${show(seq)}.`);
    if (!Array.isArray(records)) throw badRecord(`expected an array of records; received ${show(records)}.`);
    records.forEach((r, i) => {
      const owner = !isObject(r) ? undefined : r.type === 'run' ? (r.run as { id?: unknown } | undefined)?.id : r.type === 'window' ? (r.window as { run?: unknown } | undefined)?.run : r.type === 'marker' ? (r.marker as { run?: unknown } | undefined)?.run : r.run;
      if (owner !== runId) throw badRecord(`record ${i} of batch ${seq} belongs to run ${show(owner)}, not to the batch's run ${show(runId)}.`);
    });
    let duplicate = false;
    this.write('appendBatch', () => {
      if (this.stmt('findBatch').get(runId, seq) !== undefined) {
        duplicate = true;
        return;
      }
      this.appendRecords(records);
      if (this.stmt('runExists').get(runId) === undefined) {
        throw new TidemarkError('TIDEMARK_ERR_RUN_NOT_FOUND', `appendBatch: run ${show(runId)} is not in the store; its first batch must hold its run record.`);
      }
      this.stmt('insertBatch').run(runId, seq, records.length, this.opts.now());
    });
    return { duplicate };
  }

  private appendRecords(records: readonly SinkRecord[]): void {
    const now = this.opts.now();
    const touched = new Map<string, { count: number; last: number }>();
    for (let i = 0; i < records.length; i++) {
      const r: unknown = records[i];
      if (!isObject(r)) throw badRecord(`record ${i} is ${show(r)}, not an object.`);
      switch (r.type) {
        case 'run':
          this.insertRun(r.run as RunInfo);
          break;
        case 'window': {
          const w = r.window as WindowRecord;
          if (this.insertWindow(w, i)) {
            const t = touched.get(w.run) ?? { count: 0, last: w.step };
            t.count++;
            t.last = Math.max(t.last, w.step);
            touched.set(w.run, t);
          }
          break;
        }
        case 'marker':
          this.insertMarker(r.marker as Marker, i);
          break;
        case 'warning':
          this.insertWarning(r, i);
          break;
        case 'end':
          this.endRun(r, i);
          break;
        default:
          throw badRecord(`record ${i} has type ${show(r.type)}; expected run, window, marker, warning or end.`);
      }
    }
    for (const [runId, t] of touched) this.stmt('countWindows').run(t.count, t.last, t.last, now, runId);
  }

  heartbeat(runId: string, now: number = this.opts.now()): void {
    this.write('heartbeat', () => {
      if (this.stmt('touchRun').run(now, runId).changes === 0) throw this.notFound(runId);
    });
  }

  private insertRun(run: RunInfo): void {
    if (!isObject(run)) throw badRecord(`a run record needs a 'run' object; received ${show(run)}.`);
    const id = requireString('run.id', run.id);
    if (id.length === 0) throw badRecord('run.id must not be empty.');
    const name = requireString('run.name', run.name);
    const group = run.group === null ? null : requireString('run.group', run.group);
    if (!isObject(run.tags) || !Object.values(run.tags).every((v) => typeof v === 'string')) {
      throw badRecord(`run.tags must be an object of strings; received ${show(run.tags)}.`);
    }
    const started = requireFinite('run.started_at', run.started_at);
    if (!isObject(run.config)) throw badRecord(`run.config must be an object; received ${show(run.config)}.`);
    if (!Array.isArray(run.layers)) throw badRecord(`run.layers must be an array; received ${show(run.layers)}.`);
    const inserted = this.stmt('insertRun').run(id, name, group, toJson(run.tags), started, this.opts.now(), toJson(run.config));
    if (inserted.changes === 0) {
      // The same run begun again (a resumed writer): it is alive.
      this.stmt('touchRun').run(this.opts.now(), id);
      return;
    }
    run.layers.forEach((l: LayerInfo, position) => {
      if (!isObject(l)) throw badRecord(`run.layers[${position}] must be an object.`);
      this.stmt('insertLayer').run(
        id,
        position,
        requireString(`run.layers[${position}].name`, l.name),
        requireString(`run.layers[${position}].class_name`, l.class_name),
        requireFinite(`run.layers[${position}].params`, l.params),
        toJson(l.variables ?? []),
      );
    });
  }

  /** Returns false when the window was already stored (a resend). */
  private insertWindow(w: WindowRecord, i: number): boolean {
    if (!isObject(w)) throw badRecord(`record ${i}: a window record needs a 'window' object.`);
    const runId = requireString(`record ${i}: window.run`, w.run);
    const index = requireFinite(`record ${i}: window.index`, w.index);
    const step = requireFinite(`record ${i}: window.step`, w.step);
    if (!Array.isArray(w.pass_batches) || !w.pass_batches.every((k) => typeof k === 'number')) {
      throw badRecord(`record ${i}: window.pass_batches must be an array of numbers.`);
    }
    if (w.noise != null && (!isObject(w.noise) || typeof (w.noise as { status?: unknown }).status !== 'string')) {
      throw badRecord(`record ${i}: window.noise must be null or an object with a status.`);
    }
    if (!isObject(w.layers) || !isObject(w.network) || !isObject(w.logs)) {
      throw badRecord(`record ${i}: window ${index} of run ${show(runId)} needs 'layers', 'network' and 'logs' objects.`);
    }
    let res: Database.RunResult;
    try {
      res = this.stmt('insertWindow').run(
        runId,
        index,
        requireFinite(`record ${i}: window.first_step`, w.first_step),
        step,
        optionalFinite(`record ${i}: window.epoch`, w.epoch),
        requireFinite(`record ${i}: window.batches`, w.batches),
        optionalFinite(`record ${i}: window.batch_size`, w.batch_size),
        optionalFinite(`record ${i}: window.batches_per_epoch`, w.batches_per_epoch),
        JSON.stringify(w.pass_batches),
        real(requireNumber(`record ${i}: window.snr_floor`, w.snr_floor)),
        requireFinite(`record ${i}: window.time`, w.time),
        w.noise == null ? null : toJson(w.noise),
      );
    } catch (e) {
      const code = sqliteCode(e);
      if (code === 'SQLITE_CONSTRAINT_FOREIGNKEY') throw this.notFound(runId, 'append');
      if (code === 'SQLITE_CONSTRAINT_UNIQUE') {
        throw badRecord(`record ${i}: window ${index} of run ${show(runId)} has step ${step}, which another stored window of that run already has; steps must differ between windows.`);
      }
      throw e;
    }
    if (res.changes === 0) return false;

    const ids = this.idsOf(runId);
    this.metricPoints(ids, runId, 'network', null, null, w.network, step, i);
    for (const [layer, stats] of Object.entries(w.layers)) {
      if (!isObject(stats)) throw badRecord(`record ${i}: window.layers[${show(layer)}] must be an object.`);
      this.metricPoints(ids, runId, 'layer', layer, null, stats, step, i);
      const vars = stats.variables;
      if (vars === undefined) continue;
      if (!isObject(vars)) throw badRecord(`record ${i}: window.layers[${show(layer)}].variables must be an object.`);
      for (const [variable, vstats] of Object.entries(vars)) {
        if (!isObject(vstats)) throw badRecord(`record ${i}: variables[${show(variable)}] must be an object.`);
        this.metricPoints(ids, runId, 'variable', layer, variable, vstats, step, i);
      }
    }
    this.metricPoints(ids, runId, 'run', null, null, w.logs, step, i);
    return true;
  }

  private metricPoints(
    ids: RunSeriesIds,
    runId: string,
    scope: SeriesScope,
    layer: string | null,
    variable: string | null,
    stats: object,
    step: number,
    i: number,
  ): void {
    const insert = this.stmt('insertPoint');
    for (const [metric, value] of Object.entries(stats)) {
      if (metric === 'variables' && (scope === 'layer' || scope === 'network')) continue;
      if (value !== null && typeof value !== 'number') {
        throw badRecord(`record ${i}: metric ${show(metric)} of ${scope} ${show(variable ?? layer ?? '')} must be a number or null; received ${show(value)}.`);
      }
      // A null metric (noise_scale before it can be estimated) is no point, but its series exists,
      // so the windows read back hold the key with null.
      const id = this.seriesId(ids, runId, scope, layer, variable, metric);
      if (value !== null) insert.run(id, step, real(value));
    }
  }

  private idsOf(runId: string): RunSeriesIds {
    let ids = this.seriesIds.get(runId);
    if (ids === undefined) {
      ids = { network: new Map(), run: new Map(), layer: new Map(), variable: new Map() };
      this.seriesIds.set(runId, ids);
    }
    return ids;
  }

  /** The map of series ids for one (scope, owner); `owner` is the layer or variable name, or null. */
  private mapFor(ids: RunSeriesIds, scope: SeriesScope, owner: string | null, create: boolean): Map<string, number> | undefined {
    if (scope === 'network' || scope === 'run') return ids[scope];
    const byOwner = ids[scope];
    let m = byOwner.get(owner!);
    if (m === undefined && create) {
      m = new Map();
      byOwner.set(owner!, m);
    }
    return m;
  }

  private seriesId(
    ids: RunSeriesIds,
    runId: string,
    scope: SeriesScope,
    layer: string | null,
    variable: string | null,
    metric: string,
  ): number {
    const owner = scope === 'variable' ? variable : layer;
    const m = this.mapFor(ids, scope, owner, true)!;
    const known = m.get(metric);
    if (known !== undefined) return known;
    const found = this.stmt('findSeries').get(runId, metric, scope, layer ?? '', variable ?? '') as { id: number } | undefined;
    let id: number;
    if (found !== undefined) id = found.id;
    else {
      id = Number(this.stmt('insertSeries').run(runId, scope, layer, variable, metric).lastInsertRowid);
      this.created.push({ runId, scope, owner, metric });
    }
    m.set(metric, id);
    return id;
  }

  private forgetSeries(runId: string, scope: SeriesScope, owner: string | null, metric: string): void {
    const ids = this.seriesIds.get(runId);
    if (ids !== undefined) this.mapFor(ids, scope, owner, false)?.delete(metric);
  }

  private insertMarker(m: Marker, i: number): void {
    if (!isObject(m)) throw badRecord(`record ${i}: a marker record needs a 'marker' object.`);
    const runId = requireString(`record ${i}: marker.run`, m.run);
    const layer = m.layer === null ? null : requireString(`record ${i}: marker.layer`, m.layer);
    const details = m.details === undefined ? {} : m.details;
    if (!isObject(details)) throw badRecord(`record ${i}: marker.details must be an object.`);
    try {
      this.stmt('insertMarker').run(
        runId,
        layer,
        requireString(`record ${i}: marker.kind`, m.kind),
        real(requireNumber(`record ${i}: marker.step`, m.step)),
        real(requireNumber(`record ${i}: marker.detected_step`, m.detected_step)),
        real(requireNumber(`record ${i}: marker.confidence`, m.confidence)),
        toJson(details),
      );
    } catch (e) {
      if (sqliteCode(e) === 'SQLITE_CONSTRAINT_FOREIGNKEY') throw this.notFound(runId, 'append');
      throw e;
    }
  }

  private insertWarning(r: Record<string, unknown>, i: number): void {
    const runId = requireString(`record ${i}: warning.run`, r.run);
    try {
      this.stmt('insertWarning').run(
        runId,
        requireString(`record ${i}: warning.code`, r.code),
        requireString(`record ${i}: warning.message`, r.message),
        optionalFinite(`record ${i}: warning.step`, r.step),
        requireFinite(`record ${i}: warning.time`, r.time),
      );
    } catch (e) {
      if (sqliteCode(e) === 'SQLITE_CONSTRAINT_FOREIGNKEY') throw this.notFound(runId, 'append');
      throw e;
    }
  }

  private endRun(r: Record<string, unknown>, i: number): void {
    const runId = requireString(`record ${i}: end.run`, r.run);
    const status = r.status as RunStatus;
    if (!RUN_STATUSES.includes(status)) {
      throw badRecord(`record ${i}: end.status must be one of ${RUN_STATUSES.join(', ')}; received ${show(r.status)}.`);
    }
    const res = this.stmt('endRun').run(
      status,
      requireFinite(`record ${i}: end.time`, r.time),
      real(requireNumber(`record ${i}: end.step`, r.step)),
      runId,
    );
    if (res.changes === 0) throw this.notFound(runId, 'append');
  }

  deleteRun(runId: string): boolean {
    let deleted = false;
    this.write('deleteRun', () => {
      deleted = this.deleteOne(runId);
    });
    return deleted;
  }

  prune(before: number): string[] {
    if (typeof before !== 'number' || Number.isNaN(before)) {
      throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `prune: 'before' must be a time in ms since the epoch; received ${show(before)}.`);
    }
    const ids: string[] = [];
    this.write('prune', () => {
      // A live run (running, heartbeat fresh) is never pruned, however old.
      const rows = this.stmt('pruneCandidates').all(before, this.cutoff()) as { id: string }[];
      for (const { id } of rows) if (this.deleteOne(id)) ids.push(id);
    });
    return ids;
  }

  private deleteOne(runId: string): boolean {
    this.stmt('deletePoints').run(runId);
    // Layers, series, windows, markers and warnings go with the run (ON DELETE CASCADE).
    const gone = this.stmt('deleteRun').run(runId).changes > 0;
    this.seriesIds.delete(runId);
    return gone;
  }

  close(): void {
    const db = this.db;
    if (db === null) return;
    this.db = null;
    this.seriesIds.clear();
    db.close();
  }

  // -------------------------------------------------------------------------------------------
  // Reading

  runs(filter: RunFilter = {}): RunRow[] {
    if (typeof filter !== 'object' || filter === null) throw invalidOption('runs', 'filter', 'an object', filter);
    checkKeys('runs', filter, FILTER_KEYS);
    const where: string[] = [];
    const params: Record<string, unknown> = { cutoff: this.cutoff() };
    if (filter.name !== undefined) {
      if (typeof filter.name !== 'string') throw invalidOption('runs', 'name', 'a string', filter.name);
      where.push('instr(lower(name), lower(@name)) > 0');
      params.name = filter.name;
    }
    if (filter.group !== undefined) {
      if (typeof filter.group !== 'string') throw invalidOption('runs', 'group', 'a string', filter.group);
      where.push('group_name = @group');
      params.group = filter.group;
    }
    if (filter.tags !== undefined) {
      if (!isObject(filter.tags)) throw invalidOption('runs', 'tags', 'an object of strings', filter.tags);
      Object.entries(filter.tags).forEach(([k, v], n) => {
        if (typeof v !== 'string') throw invalidOption('runs', `tags.${k}`, 'a string', v);
        where.push(`EXISTS (SELECT 1 FROM json_each(runs.tags) WHERE key = @tk${n} AND value = @tv${n})`);
        params[`tk${n}`] = k;
        params[`tv${n}`] = v;
      });
    }
    if (filter.status !== undefined) {
      if (!RUN_STATUSES.includes(filter.status)) throw invalidOption('runs', 'status', RUN_STATUSES.join(', '), filter.status);
      where.push(`${STATUS_EXPR} = @status`);
      params.status = filter.status;
    }
    const limit = filter.limit ?? 1000;
    if (!Number.isInteger(limit) || limit < 1) throw invalidOption('runs', 'limit', 'a positive integer', limit);
    params.limit = limit;
    const sql = `SELECT ${RUN_COLUMNS}, ${STATUS_EXPR} AS status FROM runs${where.length > 0 ? ` WHERE ${where.join(' AND ')}` : ''}
      ORDER BY created_at DESC, id LIMIT @limit`;
    return this.read('runs', () => (this.prepared(sql).all(params) as RunDbRow[]).map(toRunRow));
  }

  /** Statements whose text depends on which filters are given: prepared once per shape, then reused. */
  private prepared(sql: string): Stmt {
    let s = this.dynamic.get(sql);
    if (s === undefined) {
      s = this.conn('query').prepare(sql);
      this.dynamic.set(sql, s);
    }
    return s;
  }

  resolveRun(ref: string): RunDetail {
    if (typeof ref !== 'string' || ref.length === 0) {
      throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `resolveRun: expected a run id, id prefix or name; received ${show(ref)}.`);
    }
    return this.read('resolveRun', () => {
      const params = { ref, cutoff: this.cutoff() };
      const exact = this.stmt('runById').get(params) as RunDbRow | undefined;
      if (exact !== undefined) return this.detail(exact);
      const found = new Map<string, RunDbRow>();
      if (ref.length >= 4) for (const r of this.stmt('runsByPrefix').all(params) as RunDbRow[]) found.set(r.id, r);
      for (const r of this.stmt('runsByName').all(params) as RunDbRow[]) found.set(r.id, r);
      const candidates = [...found.values()];
      if (candidates.length === 1) return this.detail(candidates[0]!);
      if (candidates.length > 1) {
        throw new TidemarkError(
          'TIDEMARK_ERR_RUN_AMBIGUOUS',
          `${show(ref)} matches ${candidates.length > 10 ? 'more than 10' : candidates.length} runs; name one by its id or a longer id prefix:\n${listRuns(candidates.slice(0, 10))}`,
        );
      }
      const like = this.stmt('runsLike').all(params) as RunDbRow[];
      const recent = like.length > 0 ? like : (this.stmt('runsRecent').all(params) as RunDbRow[]);
      throw new TidemarkError(
        'TIDEMARK_ERR_RUN_NOT_FOUND',
        `No run has the id, id prefix (4 characters or more) or name ${show(ref)}.` +
          (recent.length === 0
            ? ' The store has no runs.'
            : ` ${like.length > 0 ? 'Runs with similar names' : 'The most recent runs'}:\n${listRuns(recent)}`),
      );
    });
  }

  private detail(row: RunDbRow): RunDetail {
    const layers = (this.stmt('layersOf').all(row.id) as { name: string; class_name: string; params: number; variables: string }[]).map(
      (l): LayerInfo => ({ name: l.name, class_name: l.class_name, params: l.params, variables: fromJson(l.variables) }),
    );
    return { ...toRunRow(row), layers };
  }

  private notFound(runId: string, doing?: string): TidemarkError {
    return new TidemarkError(
      'TIDEMARK_ERR_RUN_NOT_FOUND',
      doing === 'append'
        ? `append: the records name run ${show(runId)}, which the store does not have; send its run record (or call beginRun) first.`
        : `No run has the id ${show(runId)}; find it with runs() or resolveRun().`,
    );
  }

  private requireRun(runId: string): void {
    if (typeof runId !== 'string') throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `expected a run id; received ${show(runId)}.`);
    if (this.stmt('runExists').get(runId) === undefined) throw this.notFound(runId);
  }

  seriesKeys(runId: string): SeriesKey[] {
    return this.read('seriesKeys', () => {
      this.requireRun(runId);
      const keys = (this.stmt('seriesOf').all(runId) as SeriesDbRow[]).map(
        (s): SeriesKey => ({ metric: s.metric, layer: s.scope === 'variable' ? s.variable : s.layer, scope: s.scope }),
      );
      if (this.stmt('hasWindows').get(runId) !== undefined) {
        const logged = new Set(keys.filter((k) => k.scope === 'run').map((k) => k.metric));
        for (const metric of WINDOW_SERIES) if (!logged.has(metric)) keys.push({ metric, layer: null, scope: 'run' });
      }
      return keys;
    });
  }

  series(runId: string, metric: string, query: SeriesQuery = {}): SeriesPoint[] {
    if (typeof metric !== 'string') throw invalidOption('series', 'metric', 'a metric name', metric);
    if (typeof query !== 'object' || query === null) throw invalidOption('series', 'query', 'an object', query);
    checkKeys('series', query, SERIES_QUERY_KEYS);
    const layer = query.layer ?? null;
    if (layer !== null && typeof layer !== 'string') throw invalidOption('series', 'layer', 'a layer or variable name, or null', layer);
    const from = query.from ?? -Infinity;
    const to = query.to ?? Infinity;
    if (typeof from !== 'number' || Number.isNaN(from)) throw invalidOption('series', 'from', 'a step number', from);
    if (typeof to !== 'number' || Number.isNaN(to)) throw invalidOption('series', 'to', 'a step number', to);
    const limit = query.points;
    if (limit !== undefined && (!Number.isInteger(limit) || limit < 2)) {
      throw new TidemarkRangeError('TIDEMARK_ERR_OPTION_INVALID', `series: option 'points' must be an integer of at least 2; received ${show(limit)}.`);
    }
    const last = query.last;
    if (last !== undefined && (!Number.isInteger(last) || last < 1)) throw invalidOption('series', 'last', 'an integer ≥ 1', last);
    return this.read('series', () => {
      const read = this.seriesReader(runId, metric, layer);
      if (read === null) return [];
      const [steps, values] = read(from, to, last);
      return downsample(steps, values, limit);
    });
  }

  /**
   * The statement (taking arg, from, to) that reads one series, or null when the run has no such series.
   * With no layer: the network's metric, else the run-level one (a log, or a window field).
   */
  private seriesReader(runId: string, metric: string, layer: string | null): ((from: number, to: number, last?: number) => [number[], (number | null)[]]) | null {
    const rows = this.stmt('seriesFor').all(runId, metric) as SeriesDbRow[];
    const pick =
      layer === null
        ? (rows.find((r) => r.scope === 'network') ?? rows.find((r) => r.scope === 'run'))
        : (rows.find((r) => r.scope === 'layer' && r.layer === layer) ?? rows.find((r) => r.scope === 'variable' && r.variable === layer));
    if (pick !== undefined) {
      return (from, to, last) => {
        if (last !== undefined) {
          // The newest points only, from the end of the key: a scrape of the latest value reads one row.
          const rows = (this.stmt('lastRange').all(pick.id, from, to, last) as [number, number | null][]).reverse();
          return [rows.map((r) => r[0]), rows.map((r) => r[1])];
        }
        return [this.stmt('stepsRange').all(pick.id, from, to) as number[], this.stmt('valuesRange').all(pick.id, from, to) as (number | null)[]];
      };
    }
    this.requireRun(runId);
    if (layer === null && (WINDOW_SERIES as readonly string[]).includes(metric)) {
      return (from, to, last) => {
        const all = this.stmt(`window_${metric as WindowSeries}`).all(runId, from, to) as [number, number | null][];
        const rows = last === undefined ? all : all.slice(-last);
        return [rows.map((r) => r[0]), rows.map((r) => r[1])];
      };
    }
    return null;
  }

  markers(runId: string): Marker[] {
    return this.read('markers', () => {
      this.requireRun(runId);
      return (this.stmt('markersOf').all(runId) as MarkerDbRow[]).map((m) => markerOf(runId, m));
    });
  }

  markersSince(runId: string, cursor: number): { markers: Marker[]; cursor: number } {
    if (!Number.isSafeInteger(cursor) || cursor < 0) throw invalidOption('markersSince', 'cursor', 'an integer ≥ 0 (0 for all)', cursor);
    return this.read('markersSince', () => {
      this.requireRun(runId);
      const rows = this.stmt('markersSince').all(runId, cursor) as (MarkerDbRow & { id: number })[];
      return { markers: rows.map((m) => markerOf(runId, m)), cursor: rows.at(-1)?.id ?? cursor };
    });
  }

  warnings(runId: string): StoredWarning[] {
    return this.read('warnings', () => {
      this.requireRun(runId);
      return (this.stmt('warningsOf').all(runId) as Omit<StoredWarning, 'run'>[]).map((w) => ({ run: runId, ...w }));
    });
  }

  windows(runId: string, query: WindowQuery = {}): WindowRecord[] {
    if (!isObject(query as unknown)) throw invalidOption('windows', 'query', 'an object { after, from, to, points, variables }', query);
    for (const key of ['after', 'from', 'to'] as const) {
      const v = query[key];
      if (v !== undefined && (typeof v !== 'number' || Number.isNaN(v))) throw invalidOption('windows', key, 'a step number', v);
    }
    const after = query.after ?? null;
    const points = query.points ?? null;
    if (points !== null && (!Number.isInteger(points) || points < 2)) throw invalidOption('windows', 'points', 'an integer ≥ 2', points);
    if (query.variables !== undefined && typeof query.variables !== 'boolean') throw invalidOption('windows', 'variables', 'true or false', query.variables);
    const ranged = after !== null || query.from !== undefined || query.to !== undefined;
    // `after` is exclusive and `from` inclusive; both bound from below, so the larger one holds.
    const lo = Math.max(query.from ?? -Infinity, after === null ? -Infinity : nextAbove(after));
    const hi = query.to ?? Infinity;
    return this.read('windows', () => {
      this.requireRun(runId);
      let rows: WindowDbRow[];
      let partial = ranged;
      if (points !== null) {
        // Thinning reads only the steps first (one integer per window, from the (run, step) index) and then
        // the chosen windows by key: a run of a million windows opens without reading a million rows.
        const steps = this.stmt('windowStepsRange').all(runId, lo, hi) as number[];
        if (steps.length > points) {
          rows = this.stmt('windowsAt').all(runId, JSON.stringify(thinEvenly(steps, points))) as WindowDbRow[];
          partial = true;
        } else {
          rows = this.stmt('windowsRange').all(runId, lo, hi) as WindowDbRow[];
        }
      } else {
        // The windows after a step come from the (run, step) index: a live poll or a scrape reads only what is new.
        rows = (ranged ? this.stmt('windowsRange').all(runId, lo, hi) : this.stmt('windowsOf').all(runId)) as WindowDbRow[];
      }
      const stepsJson = JSON.stringify(rows.map((r) => r.step));
      const records = rows.map((r): WindowRecord => {
        const w: WindowRecord = {
          run: runId,
          index: r.idx,
          step: r.step,
          first_step: r.first_step,
          epoch: r.epoch,
          batches: r.batches,
          batch_size: r.batch_size,
          batches_per_epoch: r.batches_per_epoch,
          pass_batches: JSON.parse(r.pass_batches) as number[],
          snr_floor: num(r.snr_floor),
          time: r.time,
          ...(r.noise === null ? {} : { noise: fromJson<NonNullable<WindowRecord['noise']>>(r.noise) }),
          layers: {},
          network: {} as LayerStats,
          logs: {},
        };
        return w;
      });
      // Series come in creation order, which is the key order of the first window that had them.
      const all = this.stmt('seriesOf').all(runId) as SeriesDbRow[];
      // Without the per-variable statistics a wide model's windows are read and sent at a third of the cost.
      const series = query.variables === false ? all.filter((s) => s.scope !== 'variable') : all;
      const values = new Map<number, Map<number, number>>();
      const pointsAll = this.stmt('pointsAll');
      const pointsAt = this.stmt('pointsAt');
      for (const s of series) {
        const m = new Map<number, number>();
        // A part of the run reads only its steps, by key; the whole run reads each series in one scan.
        const rowsOf = (partial ? pointsAt.all(s.id, stepsJson) : pointsAll.all(s.id)) as [number, number | null][];
        for (const [step, value] of rowsOf) m.set(step, num(value));
        values.set(s.id, m);
      }
      const has = (ids: number[], step: number): boolean => ids.some((id) => values.get(id)!.has(step));
      // Only the statistics that can be null in a record come back as null; a missing probe value stays absent.
      const fill = (target: Record<string, number | null>, list: SeriesDbRow[], step: number, nullable: boolean): void => {
        for (const s of list) {
          const v = values.get(s.id)!.get(step);
          if (v !== undefined) target[s.metric] = v;
          else if (nullable && NULLABLE_METRICS.has(s.metric)) target[s.metric] = null;
        }
      };
      const network = series.filter((s) => s.scope === 'network');
      const logs = series.filter((s) => s.scope === 'run');
      const layers = groupBy(series.filter((s) => s.scope === 'layer'), (s) => s.layer!);
      const variables = groupBy(series.filter((s) => s.scope === 'variable'), (s) => s.layer!);
      const variableGroups = new Map([...variables].map(([layer, list]) => [layer, groupBy(list, (s) => s.variable!)]));
      for (const w of records) {
        fill(w.network as unknown as Record<string, number | null>, network, w.step, true);
        fill(w.logs as unknown as Record<string, number | null>, logs, w.step, false);
        for (const [layer, list] of layers) {
          if (!has(list.map((s) => s.id), w.step)) continue;
          const stats = {} as LayerStats;
          fill(stats as unknown as Record<string, number | null>, list, w.step, true);
          const vars = variableGroups.get(layer);
          if (vars !== undefined) {
            stats.variables = {};
            for (const [variable, vlist] of vars) {
              if (!has(vlist.map((s) => s.id), w.step)) continue;
              const v = {} as VariableStats;
              fill(v as unknown as Record<string, number | null>, vlist, w.step, true);
              stats.variables[variable] = v;
            }
          }
          w.layers[layer] = stats;
        }
      }
      return records;
    });
  }
}

function markerOf(runId: string, m: MarkerDbRow): Marker {
  return {
    run: runId,
    layer: m.layer,
    kind: m.kind,
    step: num(m.step),
    detected_step: num(m.detected_step),
    confidence: num(m.confidence),
    details: fromJson(m.details),
  };
}

/** The smallest step greater than `v` (steps are integers). */
function nextAbove(v: number): number {
  return Number.isInteger(v) ? v + 1 : Math.ceil(v);
}

/** `n` of the items, evenly spread, the first and the last included. */
function thinEvenly<T>(items: T[], n: number): T[] {
  const out: T[] = [];
  for (let k = 0; k < n; k++) out.push(items[Math.round((k * (items.length - 1)) / (n - 1))]!);
  return out;
}

function groupBy<T>(items: T[], key: (t: T) => string): Map<string, T[]> {
  const m = new Map<string, T[]>();
  for (const it of items) {
    const k = key(it);
    const list = m.get(k);
    if (list === undefined) m.set(k, [it]);
    else list.push(it);
  }
  return m;
}

function toRunRow(r: RunDbRow): RunRow {
  return {
    id: r.id,
    name: r.name,
    group: r.group_name,
    tags: fromJson(r.tags),
    status: r.status,
    created_at: r.created_at,
    ended_at: r.ended_at,
    end_step: r.end_step,
    heartbeat_at: r.heartbeat_at,
    last_step: r.last_step,
    windows: r.window_count,
    config: fromJson(r.config),
  };
}

function listRuns(rows: RunDbRow[]): string {
  return rows
    .map((r) => `  ${r.id}  ${show(r.name)}  ${r.status}  started ${Number.isFinite(r.created_at) ? new Date(r.created_at).toISOString() : String(r.created_at)}`)
    .join('\n');
}

/** Steps and values (NULL is NaN) as points, downsampled with LTTB when there are more than `limit`. */
function downsample(steps: number[], values: (number | null)[], limit: number | undefined): SeriesPoint[] {
  const n = steps.length;
  if (limit === undefined || n <= limit) {
    const out = new Array<SeriesPoint>(n);
    for (let i = 0; i < n; i++) out[i] = { step: steps[i]!, value: num(values[i]!) };
    return out;
  }
  const ys = new Float64Array(n);
  // A Float64Array would turn null into 0: map it to NaN first.
  for (let i = 0; i < n; i++) ys[i] = num(values[i]!);
  return lttb(steps, ys, limit).map((i) => ({ step: steps[i]!, value: ys[i]! }));
}
