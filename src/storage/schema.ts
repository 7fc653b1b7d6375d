/**
 * The SQLite schema of a tidemark store, its version (`PRAGMA user_version`) and the forward
 * migrations that bring an older file up to date. `PRAGMA application_id` marks the file as ours,
 * so a database of another program is never altered.
 *
 * How values are kept (the Store rebuilds records exactly from this):
 * - Every numeric metric of every window is one point `(series_id, step, value)`; a series is one
 *   (run, scope, layer, variable, metric). Scopes: `network` (layer NULL), `layer`, `variable`
 *   (`layer` is the owning layer, `variable` the variable's name) and `run` (what `fit` logged).
 * - `value` NULL means NaN (SQLite stores NaN as NULL); ±Infinity are stored as they are. A metric
 *   that was null in the record (`noise_scale`, `travel_exponent`) has no point at that step.
 * - JSON columns (tags, config, details, …) write NaN and ±Infinity as the strings "NaN",
 *   "Infinity" and "-Infinity", as the JSON Lines sink does.
 * - Times are ms since the epoch.
 *
 * - -0 reads back as 0 (SQLite keeps no sign on a zero REAL).
 *
 * Points live in a `WITHOUT ROWID` table keyed by (series_id, step). Measured (bench/store.ts, table 1)
 * against a rowid table with a unique index on the same key: 0.56 times the bytes per point and 3 to 5
 * times faster series reads, at the same ingest rate; a rowid table with a covering index reads a whole
 * series faster still but takes 2.25 times the space. Per-variable statistics are series too (table
 * 2: a JSON column would ingest about 1.5–2 times faster but takes 1.6 times the space, and could not
 * be queried, downsampled or exported like a layer's series).
 */
import type Database from 'better-sqlite3';

/** The schema version this code writes and reads. */
export const SCHEMA_VERSION = 3;

/** `PRAGMA application_id` of a tidemark store: the bytes "TDMK". */
export const APPLICATION_ID = 0x54444d4b;

/** One step forward: turns a store of version `to - 1` into version `to`. Runs inside a transaction. */
export interface Migration {
  to: number;
  up(db: Database.Database): void;
}

const V1 = `
CREATE TABLE runs (
  id            TEXT PRIMARY KEY NOT NULL,
  name          TEXT NOT NULL,
  group_name    TEXT,
  tags          TEXT NOT NULL,             -- JSON object of strings
  status        TEXT NOT NULL CHECK (status IN ('running', 'finished', 'failed', 'interrupted')),
  created_at    REAL NOT NULL,             -- RunInfo.started_at
  ended_at      REAL,                      -- time of the end record
  end_step      INTEGER,                   -- step of the end record
  heartbeat_at  REAL NOT NULL,             -- last sign of life from the writer
  last_step     INTEGER,                   -- largest window step stored
  window_count  INTEGER NOT NULL DEFAULT 0,
  config        TEXT NOT NULL              -- JSON object
);
CREATE INDEX runs_created ON runs (created_at);
CREATE INDEX runs_name ON runs (name);

CREATE TABLE layers (
  run_id      TEXT NOT NULL REFERENCES runs (id) ON DELETE CASCADE,
  position    INTEGER NOT NULL,
  name        TEXT NOT NULL,
  class_name  TEXT NOT NULL,
  params      INTEGER NOT NULL,
  variables   TEXT NOT NULL,               -- JSON [{ name, shape, params }]
  PRIMARY KEY (run_id, position)
) WITHOUT ROWID;

CREATE TABLE series (
  id        INTEGER PRIMARY KEY,
  run_id    TEXT NOT NULL REFERENCES runs (id) ON DELETE CASCADE,
  scope     TEXT NOT NULL CHECK (scope IN ('network', 'layer', 'variable', 'run')),
  layer     TEXT,                          -- NULL for the network and run scopes
  variable  TEXT,                          -- set for the variable scope only
  metric    TEXT NOT NULL
);
-- The scope decides which of layer and variable are NULL, so ifnull(…, '') cannot make two keys equal.
CREATE UNIQUE INDEX series_key ON series (run_id, metric, scope, ifnull(layer, ''), ifnull(variable, ''));

-- No foreign key here: checking one per point would slow ingest; deleteRun removes points itself.
CREATE TABLE points (
  series_id  INTEGER NOT NULL,
  step       INTEGER NOT NULL,
  value      REAL,                         -- NULL is NaN
  PRIMARY KEY (series_id, step)
) WITHOUT ROWID;

CREATE TABLE windows (
  run_id             TEXT NOT NULL REFERENCES runs (id) ON DELETE CASCADE,
  idx                INTEGER NOT NULL,     -- WindowRecord.index
  first_step         INTEGER NOT NULL,
  step               INTEGER NOT NULL,
  epoch              INTEGER,
  batches            INTEGER NOT NULL,
  batch_size         REAL,
  batches_per_epoch  INTEGER,
  pass_batches       TEXT NOT NULL,        -- JSON array of numbers
                                           -- (version 3 adds noise TEXT: JSON of WindowRecord.noise, or NULL)
  snr_floor          REAL,                 -- NULL is NaN
  time               REAL NOT NULL,
  PRIMARY KEY (run_id, idx)
) WITHOUT ROWID;
CREATE UNIQUE INDEX windows_step ON windows (run_id, step);

CREATE TABLE markers (
  id             INTEGER PRIMARY KEY,
  run_id         TEXT NOT NULL REFERENCES runs (id) ON DELETE CASCADE,
  layer          TEXT,                     -- NULL for the whole network
  kind           TEXT NOT NULL,
  step           INTEGER,                  -- NULL is NaN
  detected_step  INTEGER,                  -- NULL is NaN
  confidence     REAL,                     -- NULL is NaN
  details        TEXT NOT NULL             -- JSON object
);
CREATE INDEX markers_run ON markers (run_id, step);
-- A marker is the same marker when (run, layer, kind, step, detected_step) match; NULL layers need their own index.
CREATE UNIQUE INDEX markers_key_layer ON markers (run_id, layer, kind, step, detected_step) WHERE layer IS NOT NULL;
CREATE UNIQUE INDEX markers_key_network ON markers (run_id, kind, step, detected_step) WHERE layer IS NULL;

CREATE TABLE warnings (
  id       INTEGER PRIMARY KEY,
  run_id   TEXT NOT NULL REFERENCES runs (id) ON DELETE CASCADE,
  code     TEXT NOT NULL,
  message  TEXT NOT NULL,
  step     INTEGER,
  time     REAL NOT NULL
);
CREATE UNIQUE INDEX warnings_key ON warnings (run_id, time, code, message);
`;

/**
 * Version 2: the numbered batches a remote writer sent through a server, so a batch resent after a lost
 * acknowledgement is recognised and stored once (the records are idempotent too, but the sequence makes
 * the acknowledgement exact).
 */
const V2 = `
CREATE TABLE ingest_batches (
  run_id       TEXT NOT NULL REFERENCES runs (id) ON DELETE CASCADE,
  seq          INTEGER NOT NULL,
  records      INTEGER NOT NULL,
  received_at  REAL NOT NULL,
  PRIMARY KEY (run_id, seq)
) WITHOUT ROWID;
`;

/**
 * Version 3: each window's noise measurement (WindowRecord.noise: how the fixed-weight noise scale was
 * measured, or why it is missing), as JSON; NULL where none was due and in windows stored before.
 */
const V3 = `
ALTER TABLE windows ADD COLUMN noise TEXT;
`;

/** Every migration, in order; the last one's `to` is {@link SCHEMA_VERSION}. */
export const MIGRATIONS: readonly Migration[] = [
  { to: 1, up: (db) => db.exec(V1) },
  { to: 2, up: (db) => db.exec(V2) },
  { to: 3, up: (db) => db.exec(V3) },
];

export interface SchemaState {
  version: number;
  applicationId: number;
  /** Tables, indexes, views or triggers in the file (0 for a new, empty file). */
  objects: number;
}

/** Reads the header fields and counts schema objects; the first read also proves it is a SQLite file. */
export function readSchemaState(db: Database.Database): SchemaState {
  // One read transaction: read apart, a second process creating the file could commit between the
  // header and the schema count, and a half-seen tidemark store would look like another program's. The
  // creator writes its tables and application_id in one transaction (migrate), so one snapshot sees both
  // or neither; an empty snapshot then goes on to migrate, which re-reads the version under the write lock.
  const read = db.transaction(
    (): SchemaState => ({
      applicationId: db.pragma('application_id', { simple: true }) as number,
      version: db.pragma('user_version', { simple: true }) as number,
      objects: (db.prepare('SELECT count(*) AS n FROM sqlite_schema').get() as { n: number }).n,
    }),
  );
  return read.deferred();
}

/**
 * Applies the migrations after the file's version in one IMMEDIATE transaction, re-reading the
 * version under the write lock so that two processes opening a new file do not both create it.
 * Returns the version reached. The caller has already checked that the file is ours and not newer.
 */
export function migrate(db: Database.Database, migrations: readonly Migration[] = MIGRATIONS): number {
  const run = db.transaction(() => {
    let version = db.pragma('user_version', { simple: true }) as number;
    for (const m of migrations) {
      if (m.to <= version) continue;
      m.up(db);
      version = m.to;
    }
    db.pragma(`application_id = ${APPLICATION_ID}`);
    db.pragma(`user_version = ${version}`);
    return version;
  });
  return run.immediate();
}

/** The version the given migrations lead to. */
export function latestVersion(migrations: readonly Migration[] = MIGRATIONS): number {
  return migrations.reduce((v, m) => Math.max(v, m.to), 0);
}
