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

-- One call stores the records of an append in the order given, in the caller's transaction: a writer
-- that trains in the same process gets its store work done in one round trip, however seldom the
-- training loop lets I/O through. doc: a JSON array of checked records (src/storage/record-check.ts);
-- numbers that JSON cannot hold are the strings "NaN", "Infinity" and "-Infinity".
-- Errors: TM404 (message: the run id) when a record names a run the store does not have; TM409
-- (message: the record's position) when a window's step is another stored window's. Notifies the channel
-- tidemark_store (payload: the schema) when anything was stored.
CREATE FUNCTION append_records(doc json, now_ms double precision) RETURNS void LANGUAGE plpgsql AS $fn$
DECLARE
  r jsonb;
  pts jsonb;
  kind text;
  rid text;
  st double precision;
  n integer;
BEGIN
  -- jsonb: parsed once here; a json value would be parsed again by every ->> on it (per point, per window).
  FOR r IN SELECT value FROM jsonb_array_elements(doc::jsonb) LOOP
    kind := r->>'type';
    IF kind = 'run' THEN
      rid := r->>'id';
      INSERT INTO runs (id, name, group_name, tags, status, created_at, heartbeat_at, config)
        VALUES (rid, r->>'name', r->>'group', r->>'tags', 'running', (r->>'started')::float8, now_ms, r->>'config')
        ON CONFLICT (id) DO NOTHING;
      GET DIAGNOSTICS n = ROW_COUNT;
      IF n = 0 THEN
        -- The same run begun again (a resumed writer): it is alive.
        UPDATE runs SET heartbeat_at = now_ms,
          status = CASE WHEN status = 'interrupted' AND ended_at IS NULL THEN 'running' ELSE status END WHERE id = rid;
      ELSE
        INSERT INTO layers (run_id, position, name, class_name, params, variables)
          SELECT rid, (l->>'position')::integer, l->>'name', l->>'class_name', (l->>'params')::float8, l->>'variables'
          FROM jsonb_array_elements(r->'layers') AS l;
      END IF;
    ELSE
      rid := r->>'run';
      IF NOT EXISTS (SELECT 1 FROM runs WHERE id = rid) THEN
        RAISE EXCEPTION USING ERRCODE = 'TM404', MESSAGE = rid;
      END IF;
      IF kind = 'window' THEN
        st := (r->>'step')::float8;
        IF EXISTS (SELECT 1 FROM windows WHERE run_id = rid AND step = st AND idx <> (r->>'index')::float8) THEN
          RAISE EXCEPTION USING ERRCODE = 'TM409', MESSAGE = r->>'i';
        END IF;
        INSERT INTO windows (run_id, idx, first_step, step, epoch, batches, batch_size, batches_per_epoch, pass_batches, snr_floor, time, noise)
          VALUES (rid, (r->>'index')::float8, (r->>'first_step')::float8, st, (r->>'epoch')::float8,
            (r->>'batches')::float8, (r->>'batch_size')::float8, (r->>'batches_per_epoch')::float8, r->>'pass_batches',
            (r->>'snr_floor')::float8, (r->>'time')::float8, r->>'noise')
          ON CONFLICT (run_id, idx) DO NOTHING;
        GET DIAGNOSTICS n = ROW_COUNT;
        -- A window already stored (a resend) adds nothing.
        IF n > 0 THEN
          pts := r->'points';
          -- Only the series this run does not have yet, in the record's key order: series are read back in
          -- creation order, as the first window had them.
          INSERT INTO series (run_id, scope, layer, variable, metric)
            SELECT rid, p->>0, p->>1, p->>2, p->>3 FROM jsonb_array_elements(pts) WITH ORDINALITY AS t (p, k)
            WHERE NOT EXISTS (SELECT 1 FROM series s WHERE s.run_id = rid AND s.metric = p->>3 AND s.scope = p->>0
              AND coalesce(s.layer, '') = coalesce(p->>1, '') AND coalesce(s.variable, '') = coalesce(p->>2, ''))
            ORDER BY k ON CONFLICT DO NOTHING;
          INSERT INTO points (series_id, step, value)
            SELECT s.id, st, (p->>4)::float8
            FROM jsonb_array_elements(pts) AS p
            JOIN series s ON s.run_id = rid AND s.metric = p->>3 AND s.scope = p->>0
              AND coalesce(s.layer, '') = coalesce(p->>1, '') AND coalesce(s.variable, '') = coalesce(p->>2, '')
            WHERE p->>4 IS NOT NULL;
          UPDATE runs SET window_count = window_count + 1,
            last_step = greatest(coalesce(last_step, st), st),
            heartbeat_at = greatest(heartbeat_at, now_ms),
            status = CASE WHEN status = 'interrupted' AND ended_at IS NULL THEN 'running' ELSE status END
            WHERE id = rid;
        END IF;
      ELSIF kind = 'marker' THEN
        INSERT INTO markers (run_id, layer, kind, step, detected_step, confidence, details)
          VALUES (rid, r->>'layer', r->>'kind', (r->>'step')::float8, (r->>'detected_step')::float8, (r->>'confidence')::float8, r->>'details')
          ON CONFLICT DO NOTHING;
      ELSIF kind = 'warning' THEN
        INSERT INTO warnings (run_id, code, message, step, time)
          VALUES (rid, r->>'code', r->>'message', (r->>'step')::float8, (r->>'time')::float8)
          ON CONFLICT DO NOTHING;
      ELSIF kind = 'end' THEN
        UPDATE runs SET status = r->>'status', ended_at = (r->>'time')::float8, end_step = (r->>'step')::float8 WHERE id = rid;
      END IF;
    END IF;
  END LOOP;
  -- Servers watching this store read what is new at once instead of at their next poll (sent at commit).
  IF json_array_length(doc) > 0 THEN
    PERFORM pg_notify('tidemark_store', current_schema());
  END IF;
END
$fn$;

-- A remote writer's numbered batch, stored once: true when (run, seq) was stored before (then nothing is
-- written). TM404 (message: batch:<run>) when the run is not stored and the batch does not carry it; TM208 when another server
-- stored the same batch while this call ran (the caller's transaction must then roll back).
CREATE FUNCTION append_batch(rid text, seq bigint, records integer, doc json, now_ms double precision) RETURNS boolean LANGUAGE plpgsql AS $fn$
DECLARE
  n integer;
BEGIN
  IF EXISTS (SELECT 1 FROM ingest_batches b WHERE b.run_id = rid AND b.seq = append_batch.seq) THEN
    RETURN true;
  END IF;
  PERFORM append_records(doc, now_ms);
  IF NOT EXISTS (SELECT 1 FROM runs WHERE id = rid) THEN
    RAISE EXCEPTION USING ERRCODE = 'TM404', MESSAGE = 'batch:' || rid;
  END IF;
  INSERT INTO ingest_batches (run_id, seq, records, received_at) VALUES (rid, append_batch.seq, records, now_ms) ON CONFLICT DO NOTHING;
  GET DIAGNOSTICS n = ROW_COUNT;
  IF n = 0 THEN
    RAISE EXCEPTION USING ERRCODE = 'TM208', MESSAGE = 'stored meanwhile';
  END IF;
  RETURN false;
END
$fn$;

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
