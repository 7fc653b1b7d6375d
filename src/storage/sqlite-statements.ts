/**
 * The SQL of the SQLite store, every fixed statement prepared once into one typed object: a misspelt
 * statement is a compile error, and each statement's parameters and rows are checked where it runs.
 * Only the runs() filter varies in shape; {@link runsQuery} writes it.
 */
import type Database from 'better-sqlite3';
import {
  WINDOW_SERIES,
  type CheckedFilter,
  type MarkerDbRow,
  type RunDbRow,
  type SeriesDbRow,
  type WindowDbRow,
  type WindowSeries,
} from './store-reading.js';
import type { StoredWarning } from './store.js';

/** A number that SQLite may hold as NULL (NaN, or absent). */
type Num = number | null;
/** `[step, value]`: series statements return rows as arrays (`raw`). */
export type PointRow = [step: number, value: Num];
type RunRef = { ref: string; cutoff: number };
type LayerDbRow = { name: string; class_name: string; params: number; variables: string };

const RUN_COLUMNS =
  'id, name, group_name, tags, status, created_at, ended_at, end_step, heartbeat_at, last_step, window_count, config';
/** The stored status, or `interrupted` for a running run whose writer stopped heartbeating. */
const STATUS_EXPR = "CASE WHEN status = 'running' AND heartbeat_at < @cutoff THEN 'interrupted' ELSE status END";
const WINDOW_COLUMNS = 'idx, first_step, step, epoch, batches, batch_size, batches_per_epoch, pass_batches, snr_floor, time, noise';

/**
 * A prepared statement taking parameters `P` and giving rows `R`. A narrow interface of our own:
 * declaration files cannot name better-sqlite3's Statement type here, and without raw()/pluck() a
 * statement's row mode is set only where its row type is declared.
 */
export interface Stmt<P extends unknown[] = unknown[], R = unknown> {
  run(...params: P): Database.RunResult;
  get(...params: P): R | undefined;
  all(...params: P): R[];
}

/**
 * Every fixed statement of the store, prepared on `db`; `SELECT 1` existence checks keep rows `unknown`.
 * Throws what `db.prepare` throws (a schema that does not fit).
 */
export function prepareStatements(db: Database.Database) {
  /** `raw`: rows as arrays; `pluck`: the first column only. */
  const p = <P extends unknown[] = unknown[], R = unknown>(sql: string, rows?: 'raw' | 'pluck'): Stmt<P, R> => {
    const s = db.prepare<P, R>(sql);
    if (rows === 'raw') s.raw(true);
    else if (rows === 'pluck') s.pluck(true);
    return s;
  };
  return {
    insertRun: p<[string, string, string | null, string, number, number, string]>(
      `INSERT INTO runs (id, name, group_name, tags, status, created_at, heartbeat_at, config)
      VALUES (?, ?, ?, ?, 'running', ?, ?, ?) ON CONFLICT (id) DO NOTHING`,
    ),
    touchRun: p<[number, string]>(`UPDATE runs SET heartbeat_at = ?,
      status = CASE WHEN status = 'interrupted' AND ended_at IS NULL THEN 'running' ELSE status END WHERE id = ?`),
    insertLayer: p<[string, number, string, string, number, string]>(
      'INSERT INTO layers (run_id, position, name, class_name, params, variables) VALUES (?, ?, ?, ?, ?, ?)',
    ),
    insertWindow: p<[string, number, number, number, Num, number, Num, Num, string, Num, number, string | null]>(
      `INSERT INTO windows (run_id, idx, first_step, step, epoch, batches, batch_size, batches_per_epoch,
      pass_batches, snr_floor, time, noise) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?) ON CONFLICT (run_id, idx) DO NOTHING`,
    ),
    countWindows: p<[number, number, number, number, string]>(
      `UPDATE runs SET window_count = window_count + ?, last_step = max(ifnull(last_step, ?), ?),
      heartbeat_at = max(heartbeat_at, ?),
      status = CASE WHEN status = 'interrupted' AND ended_at IS NULL THEN 'running' ELSE status END WHERE id = ?`,
    ),
    findSeries: p<[string, string, string, string, string], { id: number }>(
      `SELECT id FROM series WHERE run_id = ? AND metric = ? AND scope = ?
      AND ifnull(layer, '') = ? AND ifnull(variable, '') = ?`,
    ),
    insertSeries: p<[string, string, string | null, string | null, string]>(
      'INSERT INTO series (run_id, scope, layer, variable, metric) VALUES (?, ?, ?, ?, ?)',
    ),
    insertPoint: p<[number, number, Num]>('INSERT INTO points (series_id, step, value) VALUES (?, ?, ?)'),
    insertMarker: p<[string, string | null, string, Num, Num, Num, string]>(
      `INSERT INTO markers (run_id, layer, kind, step, detected_step, confidence, details)
      VALUES (?, ?, ?, ?, ?, ?, ?) ON CONFLICT DO NOTHING`,
    ),
    insertWarning: p<[string, string, string, Num, number]>(
      'INSERT INTO warnings (run_id, code, message, step, time) VALUES (?, ?, ?, ?, ?) ON CONFLICT DO NOTHING',
    ),
    endRun: p<[string, number, Num, string]>('UPDATE runs SET status = ?, ended_at = ?, end_step = ? WHERE id = ?'),
    markInterrupted: p<[number]>("UPDATE runs SET status = 'interrupted' WHERE status = 'running' AND heartbeat_at < ?"),
    anyStale: p<[number]>("SELECT 1 FROM runs WHERE status = 'running' AND heartbeat_at < ? LIMIT 1"),
    runById: p<[RunRef], RunDbRow>(`SELECT ${RUN_COLUMNS}, ${STATUS_EXPR} AS status FROM runs WHERE id = @ref`),
    runsByPrefix: p<[RunRef], RunDbRow>(`SELECT ${RUN_COLUMNS}, ${STATUS_EXPR} AS status FROM runs WHERE substr(id, 1, length(@ref)) = @ref
      ORDER BY created_at DESC, id LIMIT 11`),
    runsByName: p<[RunRef], RunDbRow>(`SELECT ${RUN_COLUMNS}, ${STATUS_EXPR} AS status FROM runs WHERE name = @ref
      ORDER BY created_at DESC, id LIMIT 11`),
    runsLike: p<[RunRef], RunDbRow>(`SELECT ${RUN_COLUMNS}, ${STATUS_EXPR} AS status FROM runs WHERE instr(lower(name), lower(@ref)) > 0
      ORDER BY created_at DESC, id LIMIT 5`),
    runsRecent: p<[RunRef], RunDbRow>(`SELECT ${RUN_COLUMNS}, ${STATUS_EXPR} AS status FROM runs ORDER BY created_at DESC, id LIMIT 5`),
    runExists: p<[string]>('SELECT 1 FROM runs WHERE id = ?'),
    layersOf: p<[string], LayerDbRow>('SELECT name, class_name, params, variables FROM layers WHERE run_id = ? ORDER BY position'),
    seriesOf: p<[string], SeriesDbRow>('SELECT id, scope, layer, variable, metric FROM series WHERE run_id = ? ORDER BY id'),
    seriesFor: p<[string, string], SeriesDbRow>('SELECT id, scope, layer, variable, metric FROM series WHERE run_id = ? AND metric = ?'),
    // A series is read one column at a time: better-sqlite3 builds no row object or array per point
    // then, which halves the time of a million-point read (bench/store.ts, table 4).
    stepsRange: p<[number, number, number], number>(
      'SELECT step FROM points WHERE series_id = ? AND step >= ? AND step <= ? ORDER BY step',
      'pluck',
    ),
    valuesRange: p<[number, number, number], Num>(
      'SELECT value FROM points WHERE series_id = ? AND step >= ? AND step <= ? ORDER BY step',
      'pluck',
    ),
    // Series reads return [step, value] arrays: a million small objects would cost more than the read.
    pointsAll: p<[number], PointRow>('SELECT step, value FROM points WHERE series_id = ?', 'raw'),
    lastRange: p<[number, number, number, number], PointRow>(
      'SELECT step, value FROM points WHERE series_id = ? AND step >= ? AND step <= ? ORDER BY step DESC LIMIT ?',
      'raw',
    ),
    pointsAt: p<[number, string], PointRow>(
      'SELECT step, value FROM points WHERE series_id = ? AND step IN (SELECT value FROM json_each(?))',
      'raw',
    ),
    // The run-level series kept as window columns, one statement per column. Column names come from the
    // constant WINDOW_SERIES, never from input.
    windowSeries: Object.fromEntries(
      WINDOW_SERIES.map((col) => [
        col,
        p<[string, number, number], PointRow>(
          `SELECT step, ${col} AS value FROM windows WHERE run_id = ? AND step >= ? AND step <= ? ORDER BY step`,
          'raw',
        ),
      ]),
    ) as Record<WindowSeries, Stmt<[string, number, number], PointRow>>,
    hasWindows: p<[string]>('SELECT 1 FROM windows WHERE run_id = ? LIMIT 1'),
    windowsOf: p<[string], WindowDbRow>(`SELECT ${WINDOW_COLUMNS}
      FROM windows WHERE run_id = ? ORDER BY step`),
    windowsRange: p<[string, number, number], WindowDbRow>(`SELECT ${WINDOW_COLUMNS}
      FROM windows WHERE run_id = ? AND step >= ? AND step <= ? ORDER BY step`),
    windowStepsRange: p<[string, number, number], number>(
      'SELECT step FROM windows WHERE run_id = ? AND step >= ? AND step <= ? ORDER BY step',
      'pluck',
    ),
    windowsAt: p<[string, string], WindowDbRow>(`SELECT ${WINDOW_COLUMNS}
      FROM windows WHERE run_id = ? AND step IN (SELECT value FROM json_each(?)) ORDER BY step`),
    markersOf: p<[string], MarkerDbRow>(`SELECT layer, kind, step, detected_step, confidence, details FROM markers WHERE run_id = ?
      ORDER BY step, detected_step, id`),
    markersSince: p<[string, number], MarkerDbRow & { id: number }>(
      `SELECT id, layer, kind, step, detected_step, confidence, details FROM markers WHERE run_id = ? AND id > ?
      ORDER BY id`,
    ),
    warningsOf: p<[string], Omit<StoredWarning, 'run'>>('SELECT code, message, step, time FROM warnings WHERE run_id = ? ORDER BY time, id'),
    deletePoints: p<[string]>('DELETE FROM points WHERE series_id IN (SELECT id FROM series WHERE run_id = ?)'),
    deleteRun: p<[string]>('DELETE FROM runs WHERE id = ?'),
    findBatch: p<[string, number]>('SELECT 1 FROM ingest_batches WHERE run_id = ? AND seq = ?'),
    insertBatch: p<[string, number, number, number]>('INSERT INTO ingest_batches (run_id, seq, records, received_at) VALUES (?, ?, ?, ?)'),
    pruneCandidates: p<[number, number], { id: string }>(`SELECT id FROM runs WHERE created_at < ?
      AND NOT (status = 'running' AND heartbeat_at >= ?) ORDER BY created_at`),
  };
}

export type Statements = ReturnType<typeof prepareStatements>;

/**
 * The runs() query for one filter: its text depends only on which filters are given (and how many
 * tags), so the caller can prepare each shape once and reuse it.
 */
export function runsQuery(f: CheckedFilter, cutoff: number): { sql: string; params: Record<string, unknown> } {
  const where: string[] = [];
  const params: Record<string, unknown> = { cutoff, limit: f.limit };
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
  return { sql, params };
}
