import { spawn } from 'node:child_process';
import { mkdtempSync, readdirSync, readFileSync, rmSync, writeFileSync } from 'node:fs';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import Database from 'better-sqlite3';
import { afterAll, afterEach, describe, expect, it } from 'vitest';
import { lttb } from '../../src/analysis/lttb.js';
import { TidemarkError, TidemarkRangeError, TidemarkTypeError } from '../../src/errors.js';
import { markerKey, withoutVariables, type Marker, type RunInfo, type SinkRecord, type WindowRecord } from '../../src/protocol/records.js';
import { APPLICATION_ID, migrate, MIGRATIONS, readSchemaState, SCHEMA_VERSION } from '../../src/storage/schema.js';
import { encodeRecord } from '../../src/storage/sink.js';
import { openStore, type SqliteStore, type StoreOptions } from '../../src/storage/sqlite-store.js';
import { fakeMarkers, fakeRun, fakeWindows } from '../helpers/window-records.js';

const dir = mkdtempSync(join(tmpdir(), 'tidemark-store-'));
afterAll(() => rmSync(dir, { recursive: true, force: true }));

const open: { close(): void }[] = [];
afterEach(() => {
  for (const s of open.splice(0)) s.close();
});

let fileNo = 0;
function freshPath(): string {
  return join(dir, `s${fileNo++}.db`);
}

function store(path = freshPath(), options: StoreOptions = {}): SqliteStore {
  const s = openStore(path, options);
  open.push(s);
  return s;
}

function raw(path: string): Database.Database {
  const db = new Database(path);
  open.push(db);
  return db;
}

const windowRecs = (ws: WindowRecord[]): SinkRecord[] => ws.map((window) => ({ type: 'window', window }));

/** Runs `fn`, expecting it to throw an error of `cls` with `code` and a message matching `message`. */
function thrown(fn: () => unknown): unknown {
  try {
    fn();
  } catch (e) {
    return e;
  }
  throw new Error('expected a throw');
}

function expectCoded(fn: () => unknown, cls: new (...a: never[]) => Error, code: string, message: RegExp): Error {
  const e = thrown(fn);
  expect(e).toBeInstanceOf(cls);
  expect((e as { code: string }).code).toBe(code);
  expect((e as Error).message).toMatch(message);
  return e as Error;
}

function seeded(path = freshPath(), windows = 12, options: StoreOptions = {}): { s: SqliteStore; run: RunInfo; ws: WindowRecord[] } {
  const s = store(path, options);
  const run = fakeRun({ id: 'a1b2c3d4-0000-4000-8000-000000000001', name: 'gearbox-v3' });
  s.beginRun(run);
  const ws = fakeWindows(run, windows);
  s.append(windowRecs(ws));
  return { s, run, ws };
}

describe('SQLite store: writing and rebuilding', () => {
  it('rebuilds every window exactly, key order, NaN, ±Infinity and null noise_scale included', () => {
    const { s, run, ws } = seeded();
    const back = s.windows(run.id);
    expect(back).toEqual(ws);
    // Byte-identical JSON Lines: same keys in the same order, non-finite values preserved.
    expect(back.map((w) => encodeRecord({ type: 'window', window: w }))).toEqual(ws.map((w) => encodeRecord({ type: 'window', window: w })));
    expect(back[0]!.network.update_ratio).toBeNaN();
    expect(back[3]!.layers.dense_Dense1!.grad_snr).toBe(Infinity);
    expect(back[4]!.network.grad_snr_db).toBe(-Infinity);
    expect(back[1]!.layers.dense_Dense2!.noise_scale).toBeNull();
    expect(back[0]!.layers.dense_Dense2!.travel_exponent).toBeNull();
    expect(back[6]!.logs.loss).toBeNaN();
    expect(Object.keys(back[8]!.logs)).toEqual(['loss', 'acc']);
    expect(Object.keys(back[9]!.logs)).toEqual(['loss', 'acc', 'val_loss']);
  });

  it('keeps numbers bit-exact: subnormals, the largest double, integers above 2^53 that doubles hold', () => {
    const s = store();
    const run = fakeRun({ id: 'bits-0001', layers: 1 });
    s.beginRun(run);
    const [w] = fakeWindows(run, 1, 3, false);
    w!.network.grad_mean_norm = 5e-324;
    w!.network.grad_std_norm = Number.MAX_VALUE;
    w!.network.weight_norm = 0.1 + 0.2;
    w!.logs.big = 2 ** 53 + 2;
    s.append(windowRecs([w!]));
    const back = s.windows(run.id)[0]!;
    expect(back.network.grad_mean_norm).toBe(5e-324);
    expect(back.network.grad_std_norm).toBe(Number.MAX_VALUE);
    expect(back.network.weight_norm).toBe(0.30000000000000004);
    expect(back.logs.big).toBe(9007199254740994);
  });

  it('ignores a resent window and a resent marker: nothing is doubled', () => {
    const { s, run, ws } = seeded();
    const path = s.path;
    const markers = fakeMarkers(run).map((marker): SinkRecord => ({ type: 'marker', marker }));
    s.append(markers);
    // A sink that lost its acknowledgement resends an overlapping batch.
    s.append([...windowRecs(ws.slice(5)), ...markers, ...windowRecs(ws.slice(0, 2))]);
    const db = raw(path);
    const count = (table: string): number => (db.prepare(`SELECT count(*) AS n FROM ${table}`).get() as { n: number }).n;
    expect(count('windows')).toBe(12);
    expect(count('markers')).toBe(3);
    // Per window: network 12 metrics, 3 layers × 12, 6 variables × 11, logs 2 or 3; minus nulls.
    const expected = ws.reduce((n, w) => {
      const entries = [w.network, ...Object.values(w.layers), ...Object.values(w.layers).flatMap((l) => Object.values(l.variables!))];
      const numbers = entries.flatMap((e) => Object.entries(e).filter(([k, v]) => k !== 'variables' && v !== null));
      return n + numbers.length + Object.keys(w.logs).length;
    }, 0);
    expect(count('points')).toBe(expected);
    expect(s.windows(run.id)).toEqual(ws);
    expect(s.markers(run.id)).toHaveLength(3);
    expect(s.runs()[0]).toMatchObject({ windows: 12, last_step: 96 });
  });

  it('treats markers as the same by (run, layer, kind, step, detected_step), the network ones too', () => {
    const { s, run } = seeded(freshPath(), 1);
    const m = { run: run.id, layer: null, kind: 'note' as const, step: 5, detected_step: 6, confidence: 1, details: { text: 'a' } };
    s.append([
      { type: 'marker', marker: m },
      { type: 'marker', marker: { ...m, details: { text: 'resent' } } },
      { type: 'marker', marker: { ...m, detected_step: 7 } },
      { type: 'marker', marker: { ...m, layer: 'dense_Dense1' } },
    ]);
    expect(s.markers(run.id).map((x) => [x.layer, x.detected_step, x.details])).toEqual([
      [null, 6, { text: 'a' }],
      ['dense_Dense1', 6, { text: 'a' }],
      [null, 7, { text: 'a' }],
    ]);
  });

  it('keeps nothing of a batch that fails, and a later retry of it stores everything once', () => {
    const { s, run, ws } = seeded(freshPath(), 4);
    const more = fakeWindows(run, 6).slice(4);
    // A metric seen for the first time in the failing batch: its series must not survive the rollback.
    more[0]!.logs.lr = 0.01;
    more[1]!.logs.lr = 0.005;
    const stranger: SinkRecord = { type: 'marker', marker: { ...fakeMarkers(run)[0]!, run: 'no-such-run' } };
    expectCoded(() => s.append([...windowRecs(more), stranger]), TidemarkError, 'TIDEMARK_ERR_RUN_NOT_FOUND', /no-such-run.*send its run record/);
    expect(s.windows(run.id)).toEqual(ws);
    expect(s.seriesKeys(run.id).some((k) => k.metric === 'lr')).toBe(false);
    s.append(windowRecs(more));
    expect(s.windows(run.id)).toEqual([...ws, ...more]);
    expect(s.series(run.id, 'lr')).toEqual([
      { step: 40, value: 0.01 },
      { step: 48, value: 0.005 },
    ]);
  });

  it('rejects malformed records with TIDEMARK_ERR_RECORD_INVALID naming the field, and keeps none of the batch', () => {
    const { s, run, ws } = seeded(freshPath(), 2);
    const [w] = fakeWindows(run, 3).slice(2);
    const bad = { ...w!, network: { ...w!.network, grad_snr: '3' as unknown as number } };
    expectCoded(() => s.append(windowRecs([bad])), TidemarkTypeError, 'TIDEMARK_ERR_RECORD_INVALID', /metric "grad_snr" of network .* received "3"/);
    expectCoded(() => s.append([{ type: 'nope' } as unknown as SinkRecord]), TidemarkTypeError, 'TIDEMARK_ERR_RECORD_INVALID', /type "nope"/);
    const sameStep = { ...w!, index: 99, step: ws[1]!.step };
    expectCoded(() => s.append(windowRecs([sameStep])), TidemarkTypeError, 'TIDEMARK_ERR_RECORD_INVALID', /step 16, which another stored window/);
    expect(s.windows(run.id)).toEqual(ws);
  });

  it('creates the schema: WAL, version and application id, points WITHOUT ROWID', () => {
    const { s } = seeded(freshPath(), 1);
    const db = raw(s.path);
    expect(db.pragma('journal_mode', { simple: true })).toBe('wal');
    expect(db.pragma('user_version', { simple: true })).toBe(SCHEMA_VERSION);
    expect(db.pragma('application_id', { simple: true })).toBe(APPLICATION_ID);
    const tables = (db.prepare("SELECT name, sql FROM sqlite_schema WHERE type = 'table' ORDER BY name").all() as { name: string; sql: string }[]);
    expect(tables.map((t) => t.name)).toEqual(['ingest_batches', 'layers', 'markers', 'points', 'runs', 'series', 'warnings', 'windows']);
    expect(tables.find((t) => t.name === 'points')!.sql).toMatch(/WITHOUT ROWID$/);
    expect(db.pragma('integrity_check', { simple: true })).toBe('ok');
  });

  it('runs forward migrations once and records the version reached', () => {
    const path = freshPath();
    seeded(path, 1).s.close();
    const db = raw(path);
    const v2 = [...MIGRATIONS, { to: SCHEMA_VERSION + 1, up: (d: Database.Database) => d.exec('CREATE TABLE extra (x)') }];
    expect(migrate(db, v2)).toBe(SCHEMA_VERSION + 1);
    expect(migrate(db, v2)).toBe(SCHEMA_VERSION + 1);
    expect(db.pragma('user_version', { simple: true })).toBe(SCHEMA_VERSION + 1);
    expect(db.prepare("SELECT count(*) AS n FROM sqlite_schema WHERE name = 'extra'").get()).toEqual({ n: 1 });
  });

  it('upgrades a version-1 store to the current version in place, keeping its runs', () => {
    const path = freshPath();
    const db = new Database(path);
    migrate(db, MIGRATIONS.slice(0, 1));
    expect(db.pragma('user_version', { simple: true })).toBe(1);
    db.close();
    const s = store(path);
    const run = fakeRun({ id: 'old-0001' });
    s.beginRun(run);
    expect(s.appendBatch(run.id, 0, windowRecs(fakeWindows(run, 2)))).toEqual({ duplicate: false });
    expect(raw(path).pragma('user_version', { simple: true })).toBe(SCHEMA_VERSION);
  });

  it('upgrades a version-2 store in place: its windows read back without a noise measurement, new ones keep theirs', () => {
    const path = freshPath();
    const db = new Database(path);
    migrate(db, MIGRATIONS.slice(0, 2));
    db.close();
    const s = store(path);
    const run = fakeRun({ id: 'old-0002' });
    s.beginRun(run);
    const [plain, measured] = fakeWindows(run, 2);
    const noise = { status: 'measured' as const, reason: null, groups: 8, group_rows: 32, rows: 256, population: 2000, ms: 12.5 };
    s.append(windowRecs([plain!, { ...measured!, noise }]));
    const back = s.windows(run.id);
    expect(back[0]).toEqual(plain);
    expect(back[0]!.noise).toBeUndefined();
    expect(back[1]!.noise).toEqual(noise);
    expect(raw(path).pragma('user_version', { simple: true })).toBe(3);
  });

  it('works in memory', () => {
    const s = store(':memory:');
    const run = fakeRun({ id: 'mem-0001' });
    s.beginRun(run);
    const ws = fakeWindows(run, 3);
    s.append(windowRecs(ws));
    expect(s.windows(run.id)).toEqual(ws);
  });
});

describe('SQLite store: queries', () => {
  it('reads a series by metric, layer, variable and inclusive step range', () => {
    const { s, run, ws } = seeded();
    expect(s.series(run.id, 'grad_snr', { from: 16, to: 32 })).toEqual(
      [1, 2, 3].map((i) => ({ step: ws[i]!.step, value: ws[i]!.network.grad_snr })),
    );
    expect(s.series(run.id, 'weight_norm', { layer: 'dense_Dense2' }).map((p) => p.value)).toEqual(
      ws.map((w) => w.layers.dense_Dense2!.weight_norm),
    );
    expect(s.series(run.id, 'grad_mean_norm', { layer: 'dense_Dense3/bias', to: 24 }).map((p) => p.value)).toEqual(
      ws.slice(0, 3).map((w) => w.layers.dense_Dense3!.variables!['dense_Dense3/bias']!.grad_mean_norm),
    );
    // null values are absent; NaN comes back as NaN.
    expect(s.series(run.id, 'noise_scale').map((p) => p.step)).toEqual(ws.filter((w) => w.network.noise_scale !== null).map((w) => w.step));
    expect(s.series(run.id, 'loss', { from: 56, to: 56 })).toEqual([{ step: 56, value: Number.NaN }]);
    expect(s.series(run.id, 'val_loss')).toEqual([{ step: 80, value: ws[9]!.logs.val_loss }]);
    expect(s.series(run.id, 'snr_floor', { to: 8 })).toEqual([{ step: 8, value: ws[0]!.snr_floor }]);
    expect(s.series(run.id, 'no_such_metric')).toEqual([]);
    expect(s.series(run.id, 'grad_snr', { layer: 'no_such_layer' })).toEqual([]);
  });

  it('lists series keys by scope, variables under their own names', () => {
    const { s, run } = seeded(freshPath(), 10);
    const keys = s.seriesKeys(run.id);
    expect(keys.filter((k) => k.scope === 'network')).toHaveLength(12);
    expect(keys.filter((k) => k.scope === 'layer' && k.layer === 'dense_Dense1')).toHaveLength(12);
    expect(new Set(keys.filter((k) => k.scope === 'variable').map((k) => k.layer))).toEqual(
      new Set(run.layers.flatMap((l) => l.variables.map((v) => v.name))),
    );
    expect(keys.filter((k) => k.scope === 'run').map((k) => k.metric)).toEqual(['loss', 'acc', 'val_loss', 'snr_floor', 'epoch', 'batch_size']);
  });

  it('downsamples with LTTB (Steinarsson 2013) to at most `points`, the same points as lttb() over the stored series', () => {
    const s = store();
    const run = fakeRun({ id: 'long-0001', layers: 1 });
    s.beginRun(run);
    const ws = fakeWindows(run, 3000, 9, false);
    s.append(windowRecs(ws));
    const full = s.series(run.id, 'grad_snr');
    expect(full).toHaveLength(3000);
    const down = s.series(run.id, 'grad_snr', { points: 200 });
    expect(down).toHaveLength(200);
    const keep = lttb(full.map((p) => p.step), full.map((p) => p.value), 200);
    expect(down).toEqual(keep.map((i) => full[i]));
    expect(down[0]).toEqual(full[0]);
    expect(down[199]).toEqual(full[2999]);
    // A short range is returned whole.
    expect(s.series(run.id, 'grad_snr', { from: 80, to: 800, points: 200 })).toEqual(full.slice(9, 100));
    // The newest points only: the tail of the series, of a range, of a window field.
    expect(s.series(run.id, 'grad_snr', { last: 3 })).toEqual(full.slice(-3));
    expect(s.series(run.id, 'grad_snr', { to: 800, last: 2 })).toEqual(full.slice(98, 100));
    expect(s.series(run.id, 'grad_snr', { last: 5000 })).toEqual(full);
    expect(s.series(run.id, 'batch_size', { last: 1 })).toEqual([{ step: ws[2999]!.step, value: 32 }]);
    expectCoded(() => s.series(run.id, 'grad_snr', { last: 0 }), TidemarkTypeError, 'TIDEMARK_ERR_OPTION_INVALID', /'last'/);
    expectCoded(() => s.series(run.id, 'grad_snr', { points: 1 }), TidemarkRangeError, 'TIDEMARK_ERR_OPTION_INVALID', /'points' must be an integer of at least 2; received 1/);
    expectCoded(() => s.series(run.id, 'grad_snr', { point: 5 } as never), TidemarkTypeError, 'TIDEMARK_ERR_OPTION_UNKNOWN', /Unknown option 'point' of series. Did you mean 'points'\?/);
  });

  it('filters runs by name substring, group, tags and status, newest first', () => {
    let now = 1_800_000_000_000;
    const s = store(freshPath(), { now: () => now });
    const mk = (id: string, name: string, t: number, group: string | null, tags: Record<string, string>): void =>
      s.beginRun({ ...fakeRun({ id, name, group, tags, started_at: t }) });
    mk('r-0001', 'Gearbox depth 2', 1, 'depth-sweep', { seed: '1', depth: '2' });
    mk('r-0002', 'gearbox depth 4', 2, 'depth-sweep', { seed: '2', depth: '4' });
    mk('r-0003', 'iris baseline', 3, null, { seed: '1' });
    s.append([{ type: 'end', run: 'r-0001', status: 'finished', step: 100, time: 5 }]);
    s.append([{ type: 'end', run: 'r-0003', status: 'failed', step: 7, time: 6 }]);
    const ids = (f: Parameters<SqliteStore['runs']>[0]): string[] => s.runs(f).map((r) => r.id);
    expect(ids({})).toEqual(['r-0003', 'r-0002', 'r-0001']);
    expect(ids({ name: 'GEARBOX' })).toEqual(['r-0002', 'r-0001']);
    expect(ids({ group: 'depth-sweep', tags: { seed: '1' } })).toEqual(['r-0001']);
    expect(ids({ tags: { seed: '1', depth: '2' } })).toEqual(['r-0001']);
    expect(ids({ tags: { seed: '3' } })).toEqual([]);
    expect(ids({ status: 'running' })).toEqual(['r-0002']);
    expect(ids({ status: 'failed' })).toEqual(['r-0003']);
    expect(ids({ limit: 1 })).toEqual(['r-0003']);
    now += 30_001;
    expect(ids({ status: 'interrupted' })).toEqual(['r-0002']);
    expect(ids({ status: 'running' })).toEqual([]);
    expectCoded(() => s.runs({ staus: 'running' } as never), TidemarkTypeError, 'TIDEMARK_ERR_OPTION_UNKNOWN', /'staus' of runs. Did you mean 'status'\?/);
    expectCoded(() => s.runs({ status: 'done' as never }), TidemarkTypeError, 'TIDEMARK_ERR_OPTION_INVALID', /'status' must be running, finished, failed, interrupted; received "done"/);
  });

  it('resolves a run by id, unique id prefix of 4 or more characters, or exact name, and lists candidates otherwise', () => {
    const s = store();
    s.beginRun(fakeRun({ id: '0f3a9c12-aaaa', name: 'alpha', started_at: 1 }));
    s.beginRun(fakeRun({ id: '0f3b7e55-bbbb', name: 'alpha', started_at: 2 }));
    s.beginRun(fakeRun({ id: '9d00c0de-cccc', name: 'beta', started_at: 3 }));
    expect(s.resolveRun('0f3a9c12-aaaa').id).toBe('0f3a9c12-aaaa');
    expect(s.resolveRun('0f3a').id).toBe('0f3a9c12-aaaa');
    expect(s.resolveRun('beta').id).toBe('9d00c0de-cccc');
    expect(s.resolveRun('beta').layers).toEqual(fakeRun({ id: 'x' }).layers);
    const amb = expectCoded(() => s.resolveRun('alpha'), TidemarkError, 'TIDEMARK_ERR_RUN_AMBIGUOUS', /"alpha" matches 2 runs/);
    expect(amb.message).toContain('0f3a9c12-aaaa');
    expect(amb.message).toContain('0f3b7e55-bbbb');
    expect(s.resolveRun('0f3b').id).toBe('0f3b7e55-bbbb');
    // Three characters are too few for a prefix.
    expectCoded(() => s.resolveRun('0f3'), TidemarkError, 'TIDEMARK_ERR_RUN_NOT_FOUND', /most recent runs:\n {2}9d00c0de-cccc {2}"beta"/);
    const near = expectCoded(() => s.resolveRun('ALP'), TidemarkError, 'TIDEMARK_ERR_RUN_NOT_FOUND', /Runs with similar names:/);
    expect(near.message).toContain('0f3a9c12-aaaa');
    expect(near.message).not.toContain('beta');
    expectCoded(() => store().resolveRun('x'), TidemarkError, 'TIDEMARK_ERR_RUN_NOT_FOUND', /The store has no runs\./);
    expectCoded(() => s.windows('nope'), TidemarkError, 'TIDEMARK_ERR_RUN_NOT_FOUND', /No run has the id "nope"/);
  });
});

describe('SQLite store: run status, deletion', () => {
  it('goes running → finished or failed by the end record, keeping its time and step', () => {
    const { s, run } = seeded(freshPath(), 2);
    expect(s.resolveRun(run.id)).toMatchObject({ status: 'running', ended_at: null, end_step: null });
    s.append([{ type: 'end', run: run.id, status: 'failed', step: 16, time: 1_700_000_009_000 }]);
    expect(s.resolveRun(run.id)).toMatchObject({ status: 'failed', ended_at: 1_700_000_009_000, end_step: 16 });
  });

  it('reads a run whose heartbeat is older than staleAfterMs as interrupted, and persists that at the next writable open only', () => {
    let now = 1_800_000_000_000;
    const clock = (): number => now;
    const path = freshPath();
    const { s, run } = seeded(path, 2, { now: clock, staleAfterMs: 10_000 });
    s.heartbeat(run.id);
    now += 9_000;
    expect(s.resolveRun(run.id).status).toBe('running');
    now += 2_000;
    expect(s.resolveRun(run.id).status).toBe('interrupted');
    s.close();
    const stored = (): string => (raw(path).prepare('SELECT status FROM runs').get() as { status: string }).status;
    store(path, { now: clock, readonly: true, staleAfterMs: 10_000 }).close();
    expect(stored()).toBe('running');
    const again = store(path, { now: clock, staleAfterMs: 10_000 });
    expect(stored()).toBe('interrupted');
    // The writer was only stalled: its next heartbeat makes the run running again.
    again.heartbeat(run.id);
    expect(again.resolveRun(run.id).status).toBe('running');
    expectCoded(() => again.heartbeat('gone'), TidemarkError, 'TIDEMARK_ERR_RUN_NOT_FOUND', /"gone"/);
  });

  it('deletes a run and every row that belongs to it, leaving other runs whole', () => {
    const { s, run, ws } = seeded(freshPath(), 5);
    const other = fakeRun({ id: 'other-0001' });
    s.beginRun(other);
    const ows = fakeWindows(other, 4, 2);
    s.append([...windowRecs(ows), ...fakeMarkers(run).map((marker): SinkRecord => ({ type: 'marker', marker }))]);
    s.append([{ type: 'warning', run: run.id, code: 'TIDEMARK_ERR_NONFINITE', message: 'NaN', step: 24, time: 1 }]);
    expect(s.deleteRun(run.id)).toBe(true);
    expect(s.deleteRun(run.id)).toBe(false);
    const db = raw(s.path);
    for (const table of ['runs', 'layers', 'series', 'windows', 'markers', 'warnings']) {
      const col = table === 'runs' ? 'id' : 'run_id';
      expect(db.prepare(`SELECT count(*) AS n FROM ${table} WHERE ${col} = ?`).get(run.id)).toEqual({ n: 0 });
    }
    const orphans = db.prepare('SELECT count(*) AS n FROM points WHERE series_id NOT IN (SELECT id FROM series)').get();
    expect(orphans).toEqual({ n: 0 });
    expect(s.windows(other.id)).toEqual(ows);
    // The deleted run can be written again from scratch (its cached series ids were dropped).
    s.beginRun(run);
    s.append(windowRecs(ws));
    expect(s.windows(run.id)).toEqual(ws);
  });

  it('prunes runs created before a time, except live ones', () => {
    let now = 1_800_000_000_000;
    const s = store(freshPath(), { now: () => now });
    s.beginRun(fakeRun({ id: 'old-finished', started_at: 1000 }));
    s.append([{ type: 'end', run: 'old-finished', status: 'finished', step: 1, time: 2000 }]);
    s.beginRun(fakeRun({ id: 'old-live', started_at: 1000 }));
    s.beginRun(fakeRun({ id: 'new', started_at: 5000 }));
    expect(s.prune(3000)).toEqual(['old-finished']);
    now += 60_000;
    expect(s.prune(3000)).toEqual(['old-live']);
    expect(s.runs().map((r) => r.id)).toEqual(['new']);
    expectCoded(() => s.prune(Number.NaN), TidemarkTypeError, 'TIDEMARK_ERR_OPTION_INVALID', /'before' must be a time/);
  });
});

describe('SQLite store: bad input and faults', () => {
  const files = (): string[] => readdirSync(dir).sort();

  it('refuses a file that is not SQLite with TIDEMARK_ERR_STORE_OPEN and leaves its bytes untouched', () => {
    const path = join(dir, 'notes.db');
    const bytes = Buffer.from('name,value\r\nnot,sqlite\r\n'.repeat(200));
    writeFileSync(path, bytes);
    const before = files();
    for (const readonly of [false, true]) {
      const e = expectCoded(() => openStore(path, { readonly }), TidemarkError, 'TIDEMARK_ERR_STORE_OPEN', /could not open ".*notes\.db" \(SQLITE_NOTADB: the file is not a SQLite database\)/);
      expect(e.cause).toBeInstanceOf(Database.SqliteError);
    }
    expect(readFileSync(path).equals(bytes)).toBe(true);
    expect(files()).toEqual(before);
  });

  it('refuses a SQLite database of another program, untouched', () => {
    const path = join(dir, 'foreign.db');
    const db = new Database(path);
    db.exec("CREATE TABLE invoices (id INTEGER PRIMARY KEY, total REAL); INSERT INTO invoices VALUES (1, 9.5)");
    db.close();
    const bytes = readFileSync(path);
    expectCoded(() => openStore(path), TidemarkError, 'TIDEMARK_ERR_STORE_OPEN', /a SQLite database of another program .* not a tidemark store/);
    expect(readFileSync(path).equals(bytes)).toBe(true);
  });

  it('refuses a store of a newer schema version with TIDEMARK_ERR_STORE_SCHEMA, untouched', () => {
    const path = freshPath();
    seeded(path, 2).s.close();
    const db = new Database(path);
    db.pragma(`user_version = ${SCHEMA_VERSION + 1}`);
    db.close();
    const bytes = readFileSync(path);
    for (const readonly of [false, true]) {
      expectCoded(() => openStore(path, { readonly }), TidemarkError, 'TIDEMARK_ERR_STORE_SCHEMA', new RegExp(`schema version is ${SCHEMA_VERSION + 1}, newer than ${SCHEMA_VERSION}.*upgrade tidemark`));
    }
    expect(readFileSync(path).equals(bytes)).toBe(true);
  });

  it('opens read-only only what exists, and refuses writes through a read-only store', () => {
    expectCoded(() => openStore(join(dir, 'missing.db'), { readonly: true }), TidemarkError, 'TIDEMARK_ERR_STORE_OPEN', /SQLITE_CANTOPEN/);
    expect(files()).not.toContain('missing.db');
    const { s, run } = seeded(freshPath(), 1);
    const r = store(s.path, { readonly: true });
    expect(r.windows(run.id)).toHaveLength(1);
    expectCoded(() => r.append([]), TidemarkError, 'TIDEMARK_ERR_STORE_READONLY', /opened read-only/);
    expectCoded(() => r.deleteRun(run.id), TidemarkError, 'TIDEMARK_ERR_STORE_READONLY', /deleteRun/);
  });

  it('refuses use after close, and misspelt or wrong options', () => {
    const s = openStore(freshPath());
    s.close();
    s.close();
    expectCoded(() => s.runs(), TidemarkError, 'TIDEMARK_ERR_STORE_CLOSED', /was closed/);
    expectCoded(() => openStore(freshPath(), { readOnly: true } as never), TidemarkTypeError, 'TIDEMARK_ERR_OPTION_UNKNOWN', /'readOnly' of openStore. Did you mean 'readonly'\?/);
    expectCoded(() => openStore(freshPath(), { staleAfterMs: -1 }), TidemarkRangeError, 'TIDEMARK_ERR_OPTION_INVALID', /'staleAfterMs' of openStore must be a number ≥ 0; received -1/);
    expectCoded(() => openStore(''), TidemarkTypeError, 'TIDEMARK_ERR_OPTION_INVALID', /path must be a non-empty string/);
  });

  it('wraps a SQLite failure in a coded error with the cause, never SQLite text: a lock held past busyTimeoutMs', () => {
    const { s, run } = seeded(freshPath(), 1, { busyTimeoutMs: 0 });
    const other = raw(s.path);
    other.prepare('BEGIN IMMEDIATE').run();
    try {
      const e = expectCoded(
        () => s.append(windowRecs(fakeWindows(run, 2).slice(1))),
        TidemarkError,
        'TIDEMARK_ERR_STORE_WRITE',
        /^append: could not write to ".*"; nothing of this call was kept \(SQLITE_BUSY: another connection held the database lock longer than busyTimeoutMs; retry, or raise busyTimeoutMs\)\.$/,
      );
      expect(e.cause).toBeInstanceOf(Database.SqliteError);
      expect((e.cause as Error).message).not.toBe(e.message);
    } finally {
      other.prepare('ROLLBACK').run();
    }
    // Nothing was half-written: the retry stores the window once.
    s.append(windowRecs(fakeWindows(run, 2).slice(1)));
    expect(s.windows(run.id)).toHaveLength(2);
  });

  it('round-trips names, tags and layer names with quotes, SQL, unicode, newlines and 10 kB', () => {
    const s = store();
    const long = 'ø€𝄞"\''.repeat(2000);
    const names = ["it's \"quoted\"", "'); DROP TABLE runs; --", 'π ≈ 3.14159 — 训练 🚀', 'line one\nline two\r\n\ttab', long, '%_\\'];
    names.forEach((name, i) => {
      const run = fakeRun({ id: `odd-${i}`, name, group: name, tags: { [name]: name, 'a.b': '$x' } });
      run.layers[0]!.name = `dense "${name.slice(0, 20)}"`;
      s.beginRun(run);
      const ws = fakeWindows(run, 2);
      s.append(windowRecs(ws));
      const back = s.resolveRun(run.id);
      expect(back).toMatchObject({ name, group: name, tags: { [name]: name, 'a.b': '$x' }, layers: run.layers });
      expect(s.windows(run.id)).toEqual(ws);
      expect(s.runs({ name, tags: { [name]: name } }).map((r) => r.id)).toEqual([run.id]);
      expect(s.series(run.id, 'grad_snr', { layer: run.layers[0]!.name })).toHaveLength(2);
    });
    expect(s.runs()).toHaveLength(names.length);
    expect(s.resolveRun(long).name).toHaveLength(long.length);
  });
});

describe('SQLite store: concurrency', () => {
  it('lets several processes write different runs into one file while a reader reads: every window arrives once', async () => {
    const path = freshPath();
    store(path).close();
    const child = new URL('./store-writer.child.ts', import.meta.url).pathname;
    const writers = [0, 1, 2].map(
      (n) =>
        new Promise<string>((resolve, reject) => {
          const p = spawn(process.execPath, ['--import', 'tsx', child, path, `writer-${n}`, String(n + 1), '150'], {
            stdio: ['ignore', 'pipe', 'pipe'],
          });
          let out = '';
          p.stdout.on('data', (d: Buffer) => (out += d.toString()));
          p.stderr.on('data', (d: Buffer) => (out += d.toString()));
          p.on('error', reject);
          p.on('exit', (code) => (code === 0 ? resolve(out) : reject(new Error(`writer ${n} exited ${code}: ${out}`))));
        }),
    );
    // A read-only reader polls while they write; it must never see a half-written window.
    const reader = store(path, { readonly: true });
    let reads = 0;
    let done = false;
    const all = Promise.all(writers).finally(() => (done = true));
    while (!done) {
      for (const r of reader.runs()) {
        const ws = reader.windows(r.id);
        expect(ws.every((w) => Object.keys(w.layers).length === 3 && w.network.batches === 8)).toBe(true);
        // runs() and windows() are two snapshots: a writer may commit in between, never take away.
        expect(ws.length).toBeGreaterThanOrEqual(r.windows);
        reads++;
      }
      await new Promise((res) => setTimeout(res, 20));
    }
    const outputs = await all;
    expect(outputs.map((o) => o.trim())).toEqual(['ok 150', 'ok 150', 'ok 150']);
    const s = store(path);
    for (const n of [0, 1, 2]) {
      const id = `writer-${n}`;
      const expected = fakeWindows(fakeRun({ id }), 150, n + 1);
      expect(s.windows(id)).toEqual(expected);
      expect(s.resolveRun(id).status).toBe('finished');
    }
    expect(reads).toBeGreaterThan(0);
  });

  it('reads a new file\'s header and schema as one snapshot while another process creates it', () => {
    // Two training processes opening a file that does not exist yet: the second must not see the
    // first one's tables without its application_id (which read apart would call it another program's).
    const path = freshPath();
    const empty = raw(path);
    empty.pragma('journal_mode = WAL');
    const reader = raw(path);
    const creator = raw(path);
    const prepare = reader.prepare.bind(reader);
    let created = false;
    // The creator commits right between the reader's header pragmas and its schema count.
    reader.prepare = ((sql: string) => {
      if (!created && sql.includes('sqlite_schema')) {
        created = true;
        migrate(creator);
      }
      return prepare(sql);
    }) as typeof reader.prepare;
    const state = readSchemaState(reader);
    expect(created).toBe(true);
    expect(state).toEqual({ applicationId: 0, version: 0, objects: 0 });
    expect(readSchemaState(reader)).toEqual({ applicationId: APPLICATION_ID, version: SCHEMA_VERSION, objects: expect.any(Number) });
    // Another program's file (tables, no application_id) is still read as it is.
    const foreign = raw(freshPath());
    foreign.exec('CREATE TABLE t (x)');
    expect(readSchemaState(foreign)).toEqual({ applicationId: 0, version: 0, objects: 1 });
  });

  it('keeps a committed window visible to a reader opened before it', () => {
    const { s, run } = seeded(freshPath(), 1);
    const reader = store(s.path, { readonly: true });
    expect(reader.windows(run.id)).toHaveLength(1);
    s.append(windowRecs(fakeWindows(run, 2).slice(1)));
    expect(reader.windows(run.id)).toHaveLength(2);
    expect(reader.runs()[0]!.windows).toBe(2);
  });
});


describe('SQLite store: numbered batches from remote writers', () => {
  it('stores a batch once: a resent (run, seq) is acknowledged as a duplicate and adds nothing', () => {
    const s = store();
    const run = fakeRun({ id: 'remote-0001' });
    const ws = fakeWindows(run, 4);
    const first: SinkRecord[] = [{ type: 'run', run }, ...windowRecs(ws.slice(0, 2))];
    expect(s.appendBatch(run.id, 0, first)).toEqual({ duplicate: false });
    expect(s.appendBatch(run.id, 0, first)).toEqual({ duplicate: true });
    expect(s.appendBatch(run.id, 1, windowRecs(ws.slice(2)))).toEqual({ duplicate: false });
    // A batch replayed with other content under a stored seq is still a duplicate: the seq decides.
    expect(s.appendBatch(run.id, 1, windowRecs(ws.slice(0, 1)))).toEqual({ duplicate: true });
    expect(s.windows(run.id)).toEqual(ws);
    expect(s.runs()[0]).toMatchObject({ id: run.id, windows: 4 });
  });

  it('keeps nothing of a batch with a bad record, so the same seq can be sent again', () => {
    const s = store();
    const run = fakeRun({ id: 'remote-0002' });
    const ws = fakeWindows(run, 2);
    const bad = { type: 'window', window: { ...ws[1]!, layers: 'x' } } as unknown as SinkRecord;
    expectCoded(() => s.appendBatch(run.id, 0, [{ type: 'run', run }, ...windowRecs(ws.slice(0, 1)), bad]), TidemarkTypeError, 'TIDEMARK_ERR_RECORD_INVALID', /layers/);
    expect(s.runs()).toEqual([]);
    expect(s.appendBatch(run.id, 0, [{ type: 'run', run }, ...windowRecs(ws)])).toEqual({ duplicate: false });
    expect(s.windows(run.id)).toEqual(ws);
  });

  it("refuses a record of another run, a negative or fractional seq, and a batch for a run it doesn't have", () => {
    const s = store();
    const run = fakeRun({ id: 'remote-0003' });
    const other = fakeRun({ id: 'remote-0004' });
    expectCoded(() => s.appendBatch(run.id, 0, [{ type: 'run', run: other }]), TidemarkTypeError, 'TIDEMARK_ERR_RECORD_INVALID', /not to the batch's run/);
    expectCoded(() => s.appendBatch(run.id, -1, []), TidemarkTypeError, 'TIDEMARK_ERR_RECORD_INVALID', /seq/);
    expectCoded(() => s.appendBatch(run.id, 1.5, []), TidemarkTypeError, 'TIDEMARK_ERR_RECORD_INVALID', /seq/);
    expectCoded(() => s.appendBatch(run.id, 3, windowRecs(fakeWindows(run, 1))), TidemarkError, 'TIDEMARK_ERR_RUN_NOT_FOUND', /send its run record/);
  });
});

describe('SQLite store: parts of a run', () => {
  it('rebuilds only the windows after a step, equal to the same windows of the whole run', () => {
    const { s, run, ws } = seeded(freshPath(), 12);
    expect(s.windows(run.id, { after: ws[8]!.step })).toEqual(ws.slice(9));
    expect(s.windows(run.id, { after: ws.at(-1)!.step })).toEqual([]);
    expect(s.windows(run.id, { after: -1 })).toEqual(ws);
  });

  it('thins to evenly spread windows, first and last kept', () => {
    const { s, run, ws } = seeded(freshPath(), 12);
    // 12 windows to 4: positions round(k·11/3) = 0, 4, 7, 11.
    expect(s.windows(run.id, { points: 4 })).toEqual([ws[0], ws[4], ws[7], ws[11]]);
    expect(s.windows(run.id, { points: 50 })).toEqual(ws);
    expect(s.windows(run.id, { after: ws[5]!.step, points: 2 })).toEqual([ws[6], ws[11]]);
  });

  it('reads an inclusive step range, thinned within it (what a zoomed chart asks for)', () => {
    const { s, run, ws } = seeded(freshPath(), 12);
    expect(s.windows(run.id, { from: ws[3]!.step, to: ws[7]!.step })).toEqual(ws.slice(3, 8));
    // Bounds between steps take the windows inside them.
    expect(s.windows(run.id, { from: ws[3]!.step + 0.5, to: ws[7]!.step - 0.5 })).toEqual(ws.slice(4, 7));
    expect(s.windows(run.id, { from: ws[3]!.step, to: ws[7]!.step, points: 3 })).toEqual([ws[3], ws[5], ws[7]]);
    // `after` and `from` together: the tighter lower bound holds.
    expect(s.windows(run.id, { after: ws[4]!.step, from: ws[2]!.step, to: ws[6]!.step })).toEqual(ws.slice(5, 7));
    expect(s.windows(run.id, { from: ws[7]!.step, to: ws[3]!.step })).toEqual([]);
  });

  it('reads the markers stored since a cursor, in the order stored, so a poller reads only what is new', () => {
    const { s, run } = seeded(freshPath(), 4);
    s.append(fakeMarkers(run).map((marker): SinkRecord => ({ type: 'marker', marker })));
    const stored = s.markers(run.id);
    const first = s.markersSince(run.id, 0);
    expect(stored.length).toBeGreaterThan(0);
    expect(first.markers).toHaveLength(stored.length);
    expect(new Set(first.markers.map(markerKey))).toEqual(new Set(stored.map(markerKey)));
    expect(s.markersSince(run.id, first.cursor)).toEqual({ markers: [], cursor: first.cursor });
    const late: Marker = { run: run.id, layer: null, kind: 'advice', step: 8, detected_step: 32, confidence: 1, details: { verdict: 'may-stop' } };
    s.append([{ type: 'marker', marker: late }]);
    // A marker stored again is the same marker: it does not come back.
    s.append([{ type: 'marker', marker: late }]);
    const next = s.markersSince(run.id, first.cursor);
    expect(next.markers).toEqual([late]);
    expect(next.cursor).toBeGreaterThan(first.cursor);
    expect(s.markersSince(run.id, next.cursor).markers).toEqual([]);
    expectCoded(() => s.markersSince(run.id, -1), TidemarkTypeError, 'TIDEMARK_ERR_OPTION_INVALID', /cursor/);
  });

  it('leaves out the per-variable statistics when asked, and nothing else', () => {
    const { s, run, ws } = seeded(freshPath(), 12);
    const lean = s.windows(run.id, { variables: false, points: 4 });
    expect(lean).toEqual([ws[0], ws[4], ws[7], ws[11]].map((w) => withoutVariables(w!)));
    expect(Object.values(lean[1]!.layers).every((l) => l.variables === undefined)).toBe(true);
    expect(s.windows(run.id, { variables: false, after: ws[9]!.step })).toEqual(ws.slice(10).map(withoutVariables));
  });

  it('refuses a bad query', () => {
    const { s, run } = seeded(freshPath(), 2);
    expectCoded(() => s.windows(run.id, { variables: 'no' as unknown as boolean }), TidemarkTypeError, 'TIDEMARK_ERR_OPTION_INVALID', /variables/);
    expectCoded(() => s.windows(run.id, { points: 1 }), TidemarkTypeError, 'TIDEMARK_ERR_OPTION_INVALID', /points/);
    expectCoded(() => s.windows(run.id, { after: Number.NaN }), TidemarkTypeError, 'TIDEMARK_ERR_OPTION_INVALID', /after/);
    expectCoded(() => s.windows(run.id, { to: 'x' as unknown as number }), TidemarkTypeError, 'TIDEMARK_ERR_OPTION_INVALID', /'to'|to/);
  });
});
