/**
 * Opening a SQLite store file and checking it before anything writes to it: another program's
 * database and a newer schema are refused and left untouched, an older one is migrated, and every
 * statement is prepared. Also how SQLite failures become coded TidemarkErrors: SQLite's own messages
 * can quote SQL and never reach users as they are.
 */
import { mkdirSync } from 'node:fs';
import { dirname } from 'node:path';
import Database from 'better-sqlite3';
import { TidemarkError, TidemarkRangeError, TidemarkTypeError, type ErrorCode } from '../errors.js';
import { show } from './record-check.js';
import { APPLICATION_ID, migrate, readSchemaState, SCHEMA_VERSION } from './schema.js';
import { checkSchemaVersion } from './schema-version.js';
import { prepareStatements, type Statements } from './sqlite-statements.js';

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

/** The extended SQLite result code of `e` (`SQLITE_CONSTRAINT_UNIQUE`, …), or null when SQLite did not throw it. */
export function sqliteCode(e: unknown): string | null {
  return e instanceof Database.SqliteError ? e.code : null;
}

function reasonOf(e: unknown): string {
  const code = sqliteCode(e);
  if (code === null) return e instanceof Error ? e.message : String(e);
  const hit = SQLITE_REASONS.find(([prefix]) => code.startsWith(prefix));
  return `${code}: ${hit === undefined ? 'SQLite reported an error' : hit[1]}`;
}

/** `e` as a coded error saying what was being done; tidemark's own errors pass through as they are. */
export function wrap(code: ErrorCode, doing: string, e: unknown): Error {
  if (e instanceof TidemarkError || e instanceof TidemarkTypeError || e instanceof TidemarkRangeError) return e;
  return new TidemarkError(code, `${doing} (${reasonOf(e)}).`, { cause: e });
}

// ---------------------------------------------------------------------------------------------
// Opening

/** An open, checked store file with its statements prepared. */
export interface SqliteConnection {
  readonly db: Database.Database;
  readonly s: Statements;
  /** Runs `fn` in one IMMEDIATE transaction. */
  readonly inTransaction: <T>(fn: () => T) => T;
  /** Runs `fn` in one DEFERRED transaction: the reads in it see one snapshot. */
  readonly inSnapshot: <T>(fn: () => T) => T;
}

export interface OpenSettings {
  readonly: boolean;
  busyTimeoutMs: number;
  /** Runs whose heartbeat is older than this (ms since the epoch) are marked interrupted; read once, at open. */
  cutoff: () => number;
}

/**
 * Opens the store file `path` (`':memory:'` for a private one), creating it and its folder unless
 * `readonly`, checks and migrates it, prepares every statement and, when writable, persists
 * `interrupted` for runs whose writer stopped. On any failure the file is closed again.
 *
 * @throws TidemarkError TIDEMARK_ERR_STORE_OPEN or TIDEMARK_ERR_STORE_SCHEMA (see openStore).
 */
export function openConnection(path: string, settings: OpenSettings): SqliteConnection {
  const db = openFile(path, settings.readonly, settings.busyTimeoutMs);
  const tx = db.transaction((fn: () => unknown) => fn());
  let s: Statements;
  try {
    s = prepareStatements(db);
  } catch (e) {
    db.close();
    throw wrap('TIDEMARK_ERR_STORE_OPEN', `openStore: could not read the schema of ${show(path)}`, e);
  }
  const conn: SqliteConnection = {
    db,
    s,
    // IMMEDIATE takes the write lock up front, so a busy writer is waited for (busy_timeout) instead of
    // failing when a read transaction tries to upgrade.
    inTransaction: <T>(fn: () => T): T => tx.immediate(fn) as T,
    // A read of several statements (a run's windows) sees one snapshot, never a writer's later commit.
    inSnapshot: <T>(fn: () => T): T => tx.deferred(fn) as T,
  };
  if (!settings.readonly) persistInterrupted(conn, path, settings.cutoff());
  return conn;
}

function openFile(path: string, readonly: boolean, busyTimeoutMs: number): Database.Database {
  const memory = path === ':memory:';
  const where = `openStore: could not open ${show(path)}`;
  let db: Database.Database;
  try {
    if (!readonly && !memory) mkdirSync(dirname(path), { recursive: true });
    db = new Database(path, { readonly, fileMustExist: readonly, timeout: busyTimeoutMs });
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
    checkSchemaVersion(where, state.version, SCHEMA_VERSION, readonly, 'it is an empty file, not a tidemark store yet.');
    if (!readonly) {
      if (!memory && db.pragma('journal_mode', { simple: true }) !== 'wal') db.pragma('journal_mode = WAL');
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

/** Persists `interrupted` for runs whose writer stopped heartbeating; reads derive it anyway. */
function persistInterrupted(conn: SqliteConnection, path: string, cutoff: number): void {
  try {
    if (conn.s.anyStale.get(cutoff) === undefined) return;
    conn.inTransaction(() => conn.s.markInterrupted.run(cutoff));
  } catch (e) {
    // Another writer holding the lock must not stop this open; the next one will try again.
    if (sqliteCode(e)?.startsWith('SQLITE_BUSY')) return;
    conn.db.close();
    throw wrap('TIDEMARK_ERR_STORE_OPEN', `openStore: could not update ${show(path)}`, e);
  }
}
