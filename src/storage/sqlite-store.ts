/**
 * The SQLite Store (better-sqlite3): runs, their window statistics as series of points, markers and
 * warnings in one local file. Writes are synchronous, one IMMEDIATE transaction per `append`, with
 * every statement prepared once. WAL lets one writer per run and many readers work at once, and
 * several processes write different runs into one file, waiting up to `busyTimeoutMs` for the lock.
 * Every SQLite failure is rethrown as a coded TidemarkError with the original as `cause`: SQLite's
 * own messages can quote SQL and never reach users as they are.
 */
import { checkOptions, type OptionSchema } from '../option-check.js';
import { mkdirSync } from 'node:fs';
import { dirname } from 'node:path';
import Database from 'better-sqlite3';
import { TidemarkError, TidemarkRangeError, TidemarkTypeError, type ErrorCode } from '../errors.js';
import type {
  LayerInfo,
  Marker,
  RunInfo,
  SinkRecord,
  WindowRecord,
} from '../protocol/records.js';
import { decodeJson } from '../protocol/json-codec.js';
import {
  checkBatch,
  checkRecords,
  checkRun,
  show,
  type CheckedRecord,
  type EndRowIn,
  type MarkerRowIn,
  type RunRowIn,
  type WarningRowIn,
  type WindowRowIn,
} from './record-check.js';
import { APPLICATION_ID, migrate, readSchemaState, SCHEMA_VERSION } from './schema.js';
import {
  ambiguousRun,
  assembleWindows,
  checkCursor,
  checkFilter,
  checkPruneBefore,
  checkRunId,
  checkRunRef,
  checkSeriesQuery,
  checkWindowQuery,
  downsample,
  markerOf,
  num,
  runNotFound,
  runRefNotFound,
  stepClash,
  thinEvenly,
  toRunRow,
  WINDOW_SERIES,
  type MarkerDbRow,
  type RunDbRow,
  type SeriesDbRow,
  type WindowDbRow,
  type WindowSeries,
} from './store-reading.js';
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

/** SQLite turns a bound NaN into NULL anyway; saying so keeps the mapping visible. */
function real(x: number): number | null {
  return Number.isNaN(x) ? null : x;
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

/** Series ids of one run, by scope, so a point costs two Map lookups rather than a query. */
interface RunSeriesIds {
  network: Map<string, number>;
  run: Map<string, number>;
  layer: Map<string, Map<string, number>>;
  variable: Map<string, Map<string, number>>;
}


const RUN_COLUMNS =
  'id, name, group_name, tags, status, created_at, ended_at, end_step, heartbeat_at, last_step, window_count, config';
/** The stored status, or `interrupted` for a running run whose writer stopped heartbeating. */
const STATUS_EXPR = "CASE WHEN status = 'running' AND heartbeat_at < @cutoff THEN 'interrupted' ELSE status END";


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
    const checked = checkRun(run);
    this.write('beginRun', () => this.insertRun(checked));
  }

  append(records: readonly SinkRecord[]): void {
    const checked = checkRecords(records);
    this.write('append', () => this.appendRecords(checked));
  }

  appendBatch(runId: string, seq: number, records: readonly SinkRecord[]): { duplicate: boolean } {
    checkBatch(runId, seq, records);
    const checked = checkRecords(records);
    let duplicate = false;
    this.write('appendBatch', () => {
      if (this.stmt('findBatch').get(runId, seq) !== undefined) {
        duplicate = true;
        return;
      }
      this.appendRecords(checked);
      if (this.stmt('runExists').get(runId) === undefined) {
        throw new TidemarkError('TIDEMARK_ERR_RUN_NOT_FOUND', `appendBatch: run ${show(runId)} is not in the store; its first batch must hold its run record.`);
      }
      this.stmt('insertBatch').run(runId, seq, records.length, this.opts.now());
    });
    return { duplicate };
  }

  private appendRecords(records: readonly CheckedRecord[]): void {
    const now = this.opts.now();
    const touched = new Map<string, { count: number; last: number }>();
    records.forEach((r, i) => {
      switch (r.type) {
        case 'run':
          this.insertRun(r.run);
          break;
        case 'window': {
          const w = r.window;
          if (this.insertWindow(w, i)) {
            const t = touched.get(w.run) ?? { count: 0, last: w.step };
            t.count++;
            t.last = Math.max(t.last, w.step);
            touched.set(w.run, t);
          }
          break;
        }
        case 'marker':
          this.insertMarker(r.marker);
          break;
        case 'warning':
          this.insertWarning(r.warning);
          break;
        case 'end':
          this.endRun(r.end);
          break;
      }
    });
    for (const [runId, t] of touched) this.stmt('countWindows').run(t.count, t.last, t.last, now, runId);
  }

  heartbeat(runId: string, now: number = this.opts.now()): void {
    this.write('heartbeat', () => {
      if (this.stmt('touchRun').run(now, runId).changes === 0) throw runNotFound(runId);
    });
  }

  private insertRun(run: RunRowIn): void {
    const inserted = this.stmt('insertRun').run(run.id, run.name, run.group, run.tags, run.started, this.opts.now(), run.config);
    if (inserted.changes === 0) {
      // The same run begun again (a resumed writer): it is alive.
      this.stmt('touchRun').run(this.opts.now(), run.id);
      return;
    }
    for (const l of run.layers) this.stmt('insertLayer').run(run.id, l.position, l.name, l.class_name, l.params, l.variables);
  }

  /** Returns false when the window was already stored (a resend). */
  private insertWindow(w: WindowRowIn, i: number): boolean {
    let res: Database.RunResult;
    try {
      res = this.stmt('insertWindow').run(
        w.run,
        w.index,
        w.first_step,
        w.step,
        w.epoch,
        w.batches,
        w.batch_size,
        w.batches_per_epoch,
        w.pass_batches,
        real(w.snr_floor),
        w.time,
        w.noise,
      );
    } catch (e) {
      const code = sqliteCode(e);
      if (code === 'SQLITE_CONSTRAINT_FOREIGNKEY') throw runNotFound(w.run, 'append');
      if (code === 'SQLITE_CONSTRAINT_UNIQUE') throw stepClash(i, w.index, w.run, w.step);
      throw e;
    }
    if (res.changes === 0) return false;
    const ids = this.idsOf(w.run);
    const insert = this.stmt('insertPoint');
    for (const p of w.points) {
      const id = this.seriesId(ids, w.run, p.scope, p.layer, p.variable, p.metric);
      if (p.value !== null) insert.run(id, w.step, real(p.value));
    }
    return true;
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

  private insertMarker(m: MarkerRowIn): void {
    try {
      this.stmt('insertMarker').run(m.run, m.layer, m.kind, real(m.step), real(m.detected_step), real(m.confidence), m.details);
    } catch (e) {
      if (sqliteCode(e) === 'SQLITE_CONSTRAINT_FOREIGNKEY') throw runNotFound(m.run, 'append');
      throw e;
    }
  }

  private insertWarning(w: WarningRowIn): void {
    try {
      this.stmt('insertWarning').run(w.run, w.code, w.message, w.step, w.time);
    } catch (e) {
      if (sqliteCode(e) === 'SQLITE_CONSTRAINT_FOREIGNKEY') throw runNotFound(w.run, 'append');
      throw e;
    }
  }

  private endRun(e: EndRowIn): void {
    const res = this.stmt('endRun').run(e.status, e.time, real(e.step), e.run);
    if (res.changes === 0) throw runNotFound(e.run, 'append');
  }

  deleteRun(runId: string): boolean {
    let deleted = false;
    this.write('deleteRun', () => {
      deleted = this.deleteOne(runId);
    });
    return deleted;
  }

  prune(before: number): string[] {
    checkPruneBefore(before);
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
    const f = checkFilter(filter);
    const where: string[] = [];
    const params: Record<string, unknown> = { cutoff: this.cutoff(), limit: f.limit };
    if (f.name !== undefined) {
      where.push('instr(lower(name), lower(@name)) > 0');
      params.name = f.name;
    }
    if (f.group !== undefined) {
      where.push('group_name = @group');
      params.group = f.group;
    }
    f.tags.forEach(([k, v], n) => {
      where.push(`EXISTS (SELECT 1 FROM json_each(runs.tags) WHERE key = @tk${n} AND value = @tv${n})`);
      params[`tk${n}`] = k;
      params[`tv${n}`] = v;
    });
    if (f.status !== undefined) {
      where.push(`${STATUS_EXPR} = @status`);
      params.status = f.status;
    }
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
    checkRunRef(ref);
    return this.read('resolveRun', () => {
      const params = { ref, cutoff: this.cutoff() };
      const exact = this.stmt('runById').get(params) as RunDbRow | undefined;
      if (exact !== undefined) return this.detail(exact);
      const found = new Map<string, RunDbRow>();
      if (ref.length >= 4) for (const r of this.stmt('runsByPrefix').all(params) as RunDbRow[]) found.set(r.id, r);
      for (const r of this.stmt('runsByName').all(params) as RunDbRow[]) found.set(r.id, r);
      const candidates = [...found.values()];
      if (candidates.length === 1) return this.detail(candidates[0]!);
      if (candidates.length > 1) throw ambiguousRun(ref, candidates);
      const like = this.stmt('runsLike').all(params) as RunDbRow[];
      throw runRefNotFound(ref, like, like.length > 0 ? [] : (this.stmt('runsRecent').all(params) as RunDbRow[]));
    });
  }

  private detail(row: RunDbRow): RunDetail {
    const layers = (this.stmt('layersOf').all(row.id) as { name: string; class_name: string; params: number; variables: string }[]).map(
      (l): LayerInfo => ({ name: l.name, class_name: l.class_name, params: l.params, variables: decodeJson(l.variables) as LayerInfo['variables'] }),
    );
    return { ...toRunRow(row), layers };
  }

  private requireRun(runId: string): void {
    checkRunId(runId);
    if (this.stmt('runExists').get(runId) === undefined) throw runNotFound(runId);
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
    const q = checkSeriesQuery(metric, query);
    return this.read('series', () => {
      const read = this.seriesReader(runId, metric, q.layer);
      if (read === null) return [];
      const [steps, values] = read(q.from, q.to, q.last);
      return downsample(steps, values, q.points);
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
    checkCursor(cursor);
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
    const q = checkWindowQuery(query);
    return this.read('windows', () => {
      this.requireRun(runId);
      let rows: WindowDbRow[];
      let partial = q.ranged;
      if (q.points !== null) {
        // Thinning reads only the steps first (one integer per window, from the (run, step) index) and then
        // the chosen windows by key: a run of a million windows opens without reading a million rows.
        const steps = this.stmt('windowStepsRange').all(runId, q.lo, q.hi) as number[];
        if (steps.length > q.points) {
          rows = this.stmt('windowsAt').all(runId, JSON.stringify(thinEvenly(steps, q.points))) as WindowDbRow[];
          partial = true;
        } else {
          rows = this.stmt('windowsRange').all(runId, q.lo, q.hi) as WindowDbRow[];
        }
      } else {
        // The windows after a step come from the (run, step) index: a live poll or a scrape reads only what is new.
        rows = (q.ranged ? this.stmt('windowsRange').all(runId, q.lo, q.hi) : this.stmt('windowsOf').all(runId)) as WindowDbRow[];
      }
      const stepsJson = JSON.stringify(rows.map((r) => r.step));
      const all = this.stmt('seriesOf').all(runId) as SeriesDbRow[];
      // Without the per-variable statistics a wide model's windows are read and sent at a third of the cost.
      const series = q.variables ? all : all.filter((s) => s.scope !== 'variable');
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
      return assembleWindows(runId, rows, series, values);
    });
  }
}
