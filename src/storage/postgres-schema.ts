/**
 * The PostgreSQL schema of a tidemark store, its version and the forward migrations. Every table lives in
 * one PostgreSQL schema (namespace), `tidemark` unless asked otherwise, so a store shares a database with
 * anything else; its `meta` table marks the namespace as ours, and a namespace holding tables of another
 * program is never altered.
 *
 * How values are kept (the same records come back as from the SQLite store):
 * - Every numeric metric of every window is one point `(series_id, step, value)` with a composite primary
 *   key, as in SQLite; PostgreSQL's double precision holds NaN and ±Infinity themselves (no NULL for NaN).
 * - Steps are double precision: a record's steps are JavaScript numbers.
 * - JSON columns are text in the protocol's JSON (NaN as "NaN"), so a record reads back key for key as it
 *   was written (jsonb would reorder keys).
 */
import type pg from 'pg';

/** The schema version this code writes and reads. */
export const PG_SCHEMA_VERSION = 1;

/** The value of meta('application') in a tidemark namespace. */
export const PG_APPLICATION = 'tidemark';

export interface PgMigration {
  to: number;
  sql: string;
}

const V1 = `
CREATE TABLE meta (
  key    text PRIMARY KEY,
  value  text NOT NULL
);

CREATE TABLE runs (
  id            text PRIMARY KEY,
  name          text NOT NULL,
  group_name    text,
  tags          text NOT NULL,
  status        text NOT NULL CHECK (status IN ('running', 'finished', 'failed', 'interrupted')),
  created_at    double precision NOT NULL,
  ended_at      double precision,
  end_step      double precision,
  heartbeat_at  double precision NOT NULL,
  last_step     double precision,
  window_count  integer NOT NULL DEFAULT 0,
  config        text NOT NULL
);
CREATE INDEX runs_created ON runs (created_at);
CREATE INDEX runs_name ON runs (name);

CREATE TABLE layers (
  run_id      text NOT NULL REFERENCES runs (id) ON DELETE CASCADE,
  position    integer NOT NULL,
  name        text NOT NULL,
  class_name  text NOT NULL,
  params      double precision NOT NULL,
  variables   text NOT NULL,
  PRIMARY KEY (run_id, position)
);

CREATE TABLE series (
  id        bigint GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
  run_id    text NOT NULL REFERENCES runs (id) ON DELETE CASCADE,
  scope     text NOT NULL CHECK (scope IN ('network', 'layer', 'variable', 'run')),
  layer     text,
  variable  text,
  metric    text NOT NULL
);
CREATE UNIQUE INDEX series_key ON series (run_id, metric, scope, coalesce(layer, ''), coalesce(variable, ''));

-- No foreign key: checking one per point would slow ingest; deleting a run removes its points itself.
CREATE TABLE points (
  series_id  bigint NOT NULL,
  step       double precision NOT NULL,
  value      double precision NOT NULL,
  PRIMARY KEY (series_id, step)
);

CREATE TABLE windows (
  run_id             text NOT NULL REFERENCES runs (id) ON DELETE CASCADE,
  idx                double precision NOT NULL,
  first_step         double precision NOT NULL,
  step               double precision NOT NULL,
  epoch              double precision,
  batches            double precision NOT NULL,
  batch_size         double precision,
  batches_per_epoch  double precision,
  pass_batches       text NOT NULL,
  snr_floor          double precision NOT NULL,
  time               double precision NOT NULL,
  noise              text,
  PRIMARY KEY (run_id, idx)
);
CREATE UNIQUE INDEX windows_step ON windows (run_id, step);

CREATE TABLE markers (
  id             bigint GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
  run_id         text NOT NULL REFERENCES runs (id) ON DELETE CASCADE,
  layer          text,
  kind           text NOT NULL,
  step           double precision NOT NULL,
  detected_step  double precision NOT NULL,
  confidence     double precision NOT NULL,
  details        text NOT NULL
);
CREATE INDEX markers_run ON markers (run_id, step);
CREATE UNIQUE INDEX markers_key_layer ON markers (run_id, layer, kind, step, detected_step) WHERE layer IS NOT NULL;
CREATE UNIQUE INDEX markers_key_network ON markers (run_id, kind, step, detected_step) WHERE layer IS NULL;

CREATE TABLE warnings (
  id       bigint GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
  run_id   text NOT NULL REFERENCES runs (id) ON DELETE CASCADE,
  code     text NOT NULL,
  message  text NOT NULL,
  step     double precision,
  time     double precision NOT NULL
);
-- md5: a long message would not fit a btree entry.
CREATE UNIQUE INDEX warnings_key ON warnings (run_id, time, code, md5(message));

CREATE TABLE ingest_batches (
  run_id       text NOT NULL REFERENCES runs (id) ON DELETE CASCADE,
  seq          bigint NOT NULL,
  records      integer NOT NULL,
  received_at  double precision NOT NULL,
  PRIMARY KEY (run_id, seq)
);
`;

/** Every migration, in order; the last one's `to` is {@link PG_SCHEMA_VERSION}. */
export const PG_MIGRATIONS: readonly PgMigration[] = [{ to: 1, sql: V1 }];

export interface PgSchemaState {
  /** The namespace exists. */
  exists: boolean;
  /** Tables in it. */
  tables: number;
  /** meta('application'), or null. */
  application: string | null;
  /** meta('version') as a number, or 0. */
  version: number;
}

/** What the namespace holds now. `schema` is a checked identifier. */
export async function readPgSchemaState(client: pg.ClientBase, schema: string): Promise<PgSchemaState> {
  const ns = await client.query<{ tables: string }>(
    `SELECT count(c.relname) AS tables FROM pg_namespace n LEFT JOIN pg_class c ON c.relnamespace = n.oid AND c.relkind = 'r'
     WHERE n.nspname = $1 GROUP BY n.oid`,
    [schema],
  );
  if (ns.rows.length === 0) return { exists: false, tables: 0, application: null, version: 0 };
  const tables = Number(ns.rows[0]!.tables);
  const hasMeta = await client.query(`SELECT 1 FROM pg_tables WHERE schemaname = $1 AND tablename = 'meta'`, [schema]);
  if (hasMeta.rows.length === 0) return { exists: true, tables, application: null, version: 0 };
  const meta = await client.query<{ key: string; value: string }>(`SELECT key, value FROM ${schema}.meta WHERE key IN ('application', 'version')`);
  const get = (k: string): string | null => meta.rows.find((r) => r.key === k)?.value ?? null;
  return { exists: true, tables, application: get('application'), version: Number(get('version') ?? 0) };
}

/**
 * Brings the namespace to the newest version in one transaction, under an advisory lock so that two
 * servers opening a new database do not both create it. Re-reads the state under the lock. Returns the
 * version reached; the caller has checked that the namespace is ours (or empty) and not newer.
 */
export async function migratePg(client: pg.ClientBase, schema: string, migrations: readonly PgMigration[] = PG_MIGRATIONS): Promise<number> {
  await client.query('BEGIN');
  try {
    await client.query(`SELECT pg_advisory_xact_lock(hashtext($1))`, [`tidemark:${schema}`]);
    await client.query(`CREATE SCHEMA IF NOT EXISTS ${schema}`);
    await client.query(`SET LOCAL search_path TO ${schema}`);
    let { version } = await readPgSchemaState(client, schema);
    for (const m of migrations) {
      if (m.to <= version) continue;
      await client.query(m.sql);
      version = m.to;
    }
    await client.query(
      `INSERT INTO meta (key, value) VALUES ('application', $1), ('version', $2)
       ON CONFLICT (key) DO UPDATE SET value = excluded.value`,
      [PG_APPLICATION, String(version)],
    );
    await client.query('COMMIT');
    return version;
  } catch (e) {
    await client.query('ROLLBACK').catch(() => undefined);
    throw e;
  }
}
