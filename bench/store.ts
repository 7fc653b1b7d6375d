/**
 * What the SQLite store costs and how its layout was chosen. Prints tables measured side by side in
 * one run; it asserts nothing.
 *
 *   npx tsx bench/store.ts            # full sizes, about two minutes
 *   npx tsx bench/store.ts --quick    # a tenth of the sizes, well under a minute
 *
 * Tables:
 *  1. Points table layouts (the choice in src/storage/schema.ts): ingest rate, bytes per point, and
 *     the time to read a step range and a whole series, for WITHOUT ROWID keyed (series_id, step)
 *     against rowid tables with a unique or a covering index.
 *  2. Per-variable statistics as series (what the store does) against one JSON column per window.
 *  3. Ingest through Store.append against raw better-sqlite3 inserts of the same rows, same schema.
 *  4. One series of 1,000,000 points downsampled to 2,000 with LTTB, against a raw full read.
 *  5. Opening a store of 10,000,000 points and listing its runs.
 * Every file lives in a temporary directory under os.tmpdir() and is deleted at the end.
 */
import { quickFlag } from './quick-flag.js';
import { mkdtempSync, readFileSync, rmSync, statSync } from 'node:fs';
import { createRequire } from 'node:module';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import Database from 'better-sqlite3';
import type { LayerInfo, LayerStats, RunInfo, SinkRecord, VariableStats, WindowRecord } from '../src/protocol/records.js';
import { openStore } from '../src/storage/sqlite-store.js';
import { fmtInt, median, printTable, progress } from './report.js';
import { xorshift32 } from './seeded-data.js';

const USAGE = `usage: tsx bench/store.ts [--quick]
  --quick   a tenth of the sizes (tables keep their shape; figures are noisier)`;

// ---------------------------------------------------------------------------------------------
// Settings

interface Settings {
  quick: boolean;
  /** Table 1: series × steps. */
  layoutSeries: number;
  layoutSteps: number;
  /** Tables 2 and 3: windows of the reference model. */
  windows: number;
  /** Interleaved rounds of table 3. */
  rounds: number;
  /** Table 4: points in the long series. */
  longSeries: number;
  /** Table 5: points in the big store, and its runs. */
  bigPoints: number;
  bigRuns: number;
}

function readSettings(): Settings | null {
  const q = quickFlag(USAGE);
  if (q === null) return null;
  return {
    quick: q,
    layoutSeries: 100,
    layoutSteps: q ? 2_000 : 10_000,
    windows: q ? 500 : 3_000,
    rounds: q ? 2 : 3,
    longSeries: q ? 100_000 : 1_000_000,
    bigPoints: q ? 1_000_000 : 10_000_000,
    bigRuns: 20,
  };
}

// ---------------------------------------------------------------------------------------------
// Helpers


function time(f: () => void): number {
  const t0 = performance.now();
  f();
  return performance.now() - t0;
}

/** Median time of `f` over `reps` runs after `warm` untimed ones. */
function timeMedian(f: () => void, reps: number, warm = 2): number {
  for (let i = 0; i < warm; i++) f();
  const ts: number[] = [];
  for (let i = 0; i < reps; i++) ts.push(time(f));
  return median(ts);
}

const fmtMs = (x: number): string => (x < 10 ? x.toFixed(2) : x.toFixed(1));
const fmtRatio = (x: number): string => x.toFixed(2);

/** Size of a database after a checkpoint folds the WAL into it. */
function fileSize(db: Database.Database, path: string): number {
  db.pragma('wal_checkpoint(TRUNCATE)');
  return statSync(path).size;
}

function tuned(path: string): Database.Database {
  const db = new Database(path);
  db.pragma('journal_mode = WAL');
  db.pragma('synchronous = NORMAL');
  return db;
}

// ---------------------------------------------------------------------------------------------
// The reference model's records: 5 dense layers (kernel + bias), as monitor() writes them.

const LAYERS = 5;
const STEPS_PER_WINDOW = 8;
const BATCH_WINDOWS = 10;

function benchRun(id: string, startedAt = 1_700_000_000_000): RunInfo {
  const layers: LayerInfo[] = [];
  for (let i = 0; i < LAYERS; i++) {
    const name = `dense_Dense${i + 1}`;
    layers.push({
      name,
      class_name: 'Dense',
      params: 64 * 64 + 64,
      variables: [
        { name: `${name}/kernel`, shape: [64, 64], params: 64 * 64 },
        { name: `${name}/bias`, shape: [64], params: 64 },
      ],
    });
  }
  return { id, name: `bench ${id}`, group: 'bench', tags: { seed: '1' }, started_at: startedAt, config: {}, layers };
}

function benchWindows(run: RunInfo, count: number, seed: number): WindowRecord[] {
  const rng = xorshift32(seed);
  const stats = (): VariableStats => ({
    grad_mean_norm: rng(),
    grad_std_norm: rng() + 0.1,
    grad_snr: rng() * 3,
    grad_snr_db: rng() * 20 - 10,
    noise_scale: rng() < 0.1 ? null : rng() * 500,
    weight_norm: 1 + rng(),
    weight_travel: rng(),
    update_ratio: rng() * 1e-3,
    nonfinite: 0,
    batches: STEPS_PER_WINDOW,
    params: 4160,
  });
  const out: WindowRecord[] = [];
  for (let w = 0; w < count; w++) {
    const layers: Record<string, LayerStats> = {};
    for (const l of run.layers) {
      const variables: Record<string, VariableStats> = {};
      for (const v of l.variables) variables[v.name] = stats();
      layers[l.name] = { ...stats(), travel_exponent: rng(), variables };
    }
    out.push({
      run: run.id,
      index: w,
      step: (w + 1) * STEPS_PER_WINDOW,
      first_step: w * STEPS_PER_WINDOW + 1,
      epoch: Math.floor(w / 16),
      batches: STEPS_PER_WINDOW,
      batch_size: 32,
      batches_per_epoch: 128,
      pass_batches: [STEPS_PER_WINDOW],
      snr_floor: 0.33,
      time: run.started_at + w * 1000,
      layers,
      network: { ...stats(), travel_exponent: rng() },
      logs: { loss: rng(), acc: rng() },
    });
  }
  return out;
}

/** The numeric entries of a window in the order the store writes them: [scope, layer, variable, metric, value]. */
function entries(w: WindowRecord): [string, string | null, string | null, string, number | null][] {
  const out: [string, string | null, string | null, string, number | null][] = [];
  const add = (scope: string, layer: string | null, variable: string | null, s: object): void => {
    for (const [k, v] of Object.entries(s)) if (k !== 'variables') out.push([scope, layer, variable, k, v as number | null]);
  };
  add('network', null, null, w.network);
  for (const [l, s] of Object.entries(w.layers)) {
    add('layer', l, null, s);
    for (const [v, vs] of Object.entries(s.variables ?? {})) add('variable', l, v, vs);
  }
  add('run', null, null, w.logs);
  return out;
}

// ---------------------------------------------------------------------------------------------
// Table 1: points layouts

const LAYOUTS: [string, string][] = [
  ['WITHOUT ROWID (series_id, step)', 'CREATE TABLE points (series_id INTEGER NOT NULL, step INTEGER NOT NULL, value REAL, PRIMARY KEY (series_id, step)) WITHOUT ROWID'],
  ['rowid + unique index (series_id, step)', 'CREATE TABLE points (series_id INTEGER NOT NULL, step INTEGER NOT NULL, value REAL); CREATE UNIQUE INDEX points_key ON points (series_id, step)'],
  ['rowid + covering index (series_id, step, value)', 'CREATE TABLE points (series_id INTEGER NOT NULL, step INTEGER NOT NULL, value REAL); CREATE INDEX points_key ON points (series_id, step, value)'],
];

function layoutTable(dir: string, s: Settings): void {
  progress(`table 1: ${LAYOUTS.length} layouts × ${fmtInt(s.layoutSeries * s.layoutSteps)} points`);
  const rows: string[][] = [];
  const results: { ingest: number; bytes: number; range: number; full: number }[] = [];
  for (const [i, [, ddl]] of LAYOUTS.entries()) {
    const path = join(dir, `layout${i}.db`);
    const db = tuned(path);
    db.exec(ddl);
    const ins = db.prepare('INSERT INTO points VALUES (?, ?, ?)');
    const rng = xorshift32(11);
    // As training writes: every series gets one point per window, BATCH_WINDOWS windows per transaction.
    const tx = db.transaction((w0: number) => {
      for (let w = w0; w < w0 + BATCH_WINDOWS; w++) for (let sid = 1; sid <= s.layoutSeries; sid++) ins.run(sid, (w + 1) * STEPS_PER_WINDOW, rng());
    });
    const ms = time(() => {
      for (let w = 0; w < s.layoutSteps; w += BATCH_WINDOWS) tx(w);
    });
    const bytes = fileSize(db, path);
    const range = db.prepare('SELECT step, value FROM points WHERE series_id = ? AND step >= ? AND step <= ? ORDER BY step').raw();
    const full = db.prepare('SELECT step, value FROM points WHERE series_id = ? ORDER BY step').raw();
    const lo = Math.floor(s.layoutSteps * 0.45) * STEPS_PER_WINDOW;
    const hi = Math.floor(s.layoutSteps * 0.55) * STEPS_PER_WINDOW;
    let k = 0;
    const rangeMs = timeMedian(() => range.all((k++ % s.layoutSeries) + 1, lo, hi), 41, 5);
    const fullMs = timeMedian(() => full.all((k++ % s.layoutSeries) + 1), 21, 3);
    db.close();
    results.push({ ingest: (s.layoutSeries * s.layoutSteps) / (ms / 1000), bytes: bytes / (s.layoutSeries * s.layoutSteps), range: rangeMs, full: fullMs });
  }
  const base = results[0]!;
  LAYOUTS.forEach(([name], i) => {
    const r = results[i]!;
    rows.push([
      name,
      fmtInt(r.ingest),
      fmtRatio(r.ingest / base.ingest),
      r.bytes.toFixed(1),
      fmtRatio(r.bytes / base.bytes),
      fmtMs(r.range),
      fmtRatio(r.range / base.range),
      fmtMs(r.full),
      fmtRatio(r.full / base.full),
    ]);
  });
  printTable(
    `Table 1. Points table layout (${s.layoutSeries} series × ${fmtInt(s.layoutSteps)} steps, ${BATCH_WINDOWS} windows per transaction)`,
    ['layout', 'points/s', 'ratio', 'bytes/point', 'ratio', `range ms (${fmtInt(s.layoutSteps / 10)} pts)`, 'ratio', `series ms (${fmtInt(s.layoutSteps)} pts)`, 'ratio'],
    rows,
    ['ratio: against the first row (the layout the store uses). Reads: median over series, warm cache.'],
  );
}

// ---------------------------------------------------------------------------------------------
// Table 2: per-variable statistics as series, or as one JSON column per window

function variablesTable(dir: string, s: Settings): void {
  progress(`table 2: ${fmtInt(s.windows)} windows, per-variable statistics two ways`);
  const run = benchRun('vars');
  const ws = benchWindows(run, s.windows, 5);
  const results: { wps: number; bytesPerWindow: number; readMs: number }[] = [];
  for (const mode of ['series', 'json'] as const) {
    const path = join(dir, `vars-${mode}.db`);
    const db = tuned(path);
    db.exec(`CREATE TABLE points (series_id INTEGER NOT NULL, step INTEGER NOT NULL, value REAL, PRIMARY KEY (series_id, step)) WITHOUT ROWID;
      CREATE TABLE windows (idx INTEGER PRIMARY KEY, step INTEGER NOT NULL, variables TEXT)`);
    const ins = db.prepare('INSERT INTO points VALUES (?, ?, ?)');
    const insW = db.prepare('INSERT INTO windows VALUES (?, ?, ?)');
    const ids = new Map<string, number>();
    const idOf = (key: string): number => {
      let id = ids.get(key);
      if (id === undefined) ids.set(key, (id = ids.size + 1));
      return id;
    };
    const tx = db.transaction((batch: WindowRecord[]) => {
      for (const w of batch) {
        let vars: Record<string, Record<string, VariableStats>> | null = null;
        for (const [scope, layer, variable, metric, value] of entries(w)) {
          if (scope === 'variable' && mode === 'json') continue;
          if (value !== null) ins.run(idOf(`${scope}\0${layer}\0${variable}\0${metric}`), w.step, value);
        }
        if (mode === 'json') {
          vars = {};
          for (const [l, ls] of Object.entries(w.layers)) vars[l] = ls.variables!;
        }
        insW.run(w.index, w.step, vars === null ? null : JSON.stringify(vars));
      }
    });
    const ms = time(() => {
      for (let i = 0; i < ws.length; i += BATCH_WINDOWS) tx(ws.slice(i, i + BATCH_WINDOWS));
    });
    const bytes = fileSize(db, path);
    // Reading every variable statistic back, as an export does.
    const readMs = timeMedian(() => {
      if (mode === 'series') {
        const q = db.prepare('SELECT step, value FROM points WHERE series_id = ?').raw();
        for (const [key, id] of ids) if (key.startsWith('variable')) q.all(id);
      } else {
        for (const r of db.prepare('SELECT variables FROM windows').pluck().all() as string[]) JSON.parse(r);
      }
    }, 3, 1);
    db.close();
    results.push({ wps: s.windows / (ms / 1000), bytesPerWindow: bytes / s.windows, readMs });
  }
  const [a, b] = results as [(typeof results)[0], (typeof results)[0]];
  printTable(
    `Table 2. Per-variable statistics (${LAYERS} layers, ${LAYERS * 2} variables, ${fmtInt(s.windows)} windows)`,
    ['kept as', 'windows/s', 'ratio', 'bytes/window', 'ratio', 'read all ms', 'ratio'],
    [
      ['series (layer = variable name)', fmtInt(a.wps), '1', fmtInt(a.bytesPerWindow), '1', fmtMs(a.readMs), '1'],
      ['JSON column on the window row', fmtInt(b.wps), fmtRatio(b.wps / a.wps), fmtInt(b.bytesPerWindow), fmtRatio(b.bytesPerWindow / a.bytesPerWindow), fmtMs(b.readMs), fmtRatio(b.readMs / a.readMs)],
    ],
    ['The store keeps series: a variable is then charted, downsampled and filtered like a layer.'],
  );
}

// ---------------------------------------------------------------------------------------------
// Table 3: ingest through the Store against raw inserts of the same rows

interface IngestResult {
  ms: number;
  points: number;
}

function ingestStore(path: string, run: RunInfo, ws: WindowRecord[]): IngestResult {
  const store = openStore(path);
  store.beginRun(run);
  const batches: SinkRecord[][] = [];
  for (let i = 0; i < ws.length; i += BATCH_WINDOWS) batches.push(ws.slice(i, i + BATCH_WINDOWS).map((window) => ({ type: 'window', window })));
  const ms = time(() => {
    for (const b of batches) store.append(b);
  });
  store.close();
  const db = new Database(path, { readonly: true });
  const points = (db.prepare('SELECT count(*) AS n FROM points').get() as { n: number }).n;
  db.close();
  return { ms, points };
}

/**
 * The same rows written with plain prepared statements into the store's own schema: the run row,
 * the series rows, then per window its row, its points and the run's counters, one transaction per
 * batch. Rows are prepared before the clock starts, so this is the floor the Store is measured against.
 */
function ingestRaw(path: string, run: RunInfo, ws: WindowRecord[]): IngestResult {
  openStore(path).close(); // creates the schema
  const db = tuned(path);
  db.pragma('foreign_keys = ON');
  db.prepare("INSERT INTO runs (id, name, group_name, tags, status, created_at, heartbeat_at, config) VALUES (?, ?, ?, ?, 'running', ?, ?, '{}')").run(
    run.id,
    run.name,
    run.group,
    JSON.stringify(run.tags),
    run.started_at,
    Date.now(),
  );
  const seriesIds = new Map<string, number>();
  const insSeries = db.prepare('INSERT INTO series (run_id, scope, layer, variable, metric) VALUES (?, ?, ?, ?, ?)');
  type Row = { window: unknown[]; points: [number, number, number | null][] };
  const rows: Row[] = ws.map((w) => ({
    window: [run.id, w.index, w.first_step, w.step, w.epoch, w.batches, w.batch_size, w.batches_per_epoch, JSON.stringify(w.pass_batches), w.snr_floor, w.time],
    points: entries(w)
      .filter((e) => e[4] !== null)
      .map(([scope, layer, variable, metric, value]) => {
        const key = `${scope}\0${layer}\0${variable}\0${metric}`;
        let id = seriesIds.get(key);
        if (id === undefined) {
          id = Number(insSeries.run(run.id, scope, layer, variable, metric).lastInsertRowid);
          seriesIds.set(key, id);
        }
        return [id, w.step, value];
      }),
  }));
  const insWindow = db.prepare(
    'INSERT INTO windows (run_id, idx, first_step, step, epoch, batches, batch_size, batches_per_epoch, pass_batches, snr_floor, time) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)',
  );
  const insPoint = db.prepare('INSERT INTO points (series_id, step, value) VALUES (?, ?, ?)');
  const count = db.prepare('UPDATE runs SET window_count = window_count + ?, last_step = ? WHERE id = ?');
  const tx = db.transaction((batch: Row[]) => {
    for (const r of batch) {
      insWindow.run(r.window);
      for (const p of r.points) insPoint.run(p);
    }
    count.run(batch.length, batch.at(-1)!.window[3], run.id);
  });
  const batches: Row[][] = [];
  for (let i = 0; i < rows.length; i += BATCH_WINDOWS) batches.push(rows.slice(i, i + BATCH_WINDOWS));
  const ms = time(() => {
    for (const b of batches) tx.immediate(b);
  });
  const points = (db.prepare('SELECT count(*) AS n FROM points').get() as { n: number }).n;
  db.close();
  return { ms, points };
}

function ingestTable(dir: string, s: Settings): void {
  progress(`table 3: ${s.rounds} rounds × ${fmtInt(s.windows)} windows, Store and raw interleaved`);
  const run = benchRun('ingest');
  const ws = benchWindows(run, s.windows, 7);
  const storeRates: number[] = [];
  const rawRates: number[] = [];
  const ratios: number[] = [];
  let points = 0;
  for (let r = 0; r < s.rounds; r++) {
    // Alternate which goes first, so neither always gets the warmer machine.
    const order = r % 2 === 0 ? (['store', 'raw'] as const) : (['raw', 'store'] as const);
    const got: Record<string, IngestResult> = {};
    for (const which of order) {
      const path = join(dir, `ingest-${which}-${r}.db`);
      got[which] = which === 'store' ? ingestStore(path, run, ws) : ingestRaw(path, run, ws);
      rmSync(path, { force: true });
      rmSync(`${path}-wal`, { force: true });
      rmSync(`${path}-shm`, { force: true });
    }
    const st = got.store!;
    const rw = got.raw!;
    if (st.points !== rw.points) throw new Error(`bench: store wrote ${st.points} points, raw ${rw.points}`);
    points = st.points;
    storeRates.push(st.points / (st.ms / 1000));
    rawRates.push(rw.points / (rw.ms / 1000));
    ratios.push(storeRates.at(-1)! / rawRates.at(-1)!);
  }
  printTable(
    `Table 3. Ingest (${fmtInt(points)} points: ${fmtInt(s.windows)} windows × ${fmtInt(points / s.windows)} points, ${BATCH_WINDOWS} windows per append)`,
    ['writer', 'points/s (median)', 'ratio (median)', 'ratio range'],
    [
      ['raw better-sqlite3 inserts', fmtInt(median(rawRates)), '1 (base)', ''],
      ['Store.append', fmtInt(median(storeRates)), fmtRatio(median(ratios)), `${fmtRatio(Math.min(...ratios))}–${fmtRatio(Math.max(...ratios))}`],
    ],
    ['ratio: Store / raw within the same round (target ≥ 0.7). Same schema, same rows, one IMMEDIATE transaction per batch.'],
  );
}

// ---------------------------------------------------------------------------------------------
// Table 4: one long series downsampled

function downsampleTable(dir: string, s: Settings): void {
  progress(`table 4: one series of ${fmtInt(s.longSeries)} points`);
  const path = join(dir, 'long.db');
  const store = openStore(path);
  const run = benchRun('long');
  store.beginRun(run);
  const [first] = benchWindows(run, 1, 3);
  store.append([{ type: 'window', window: first! }]);
  store.close();
  // The rest of the points go straight into the store's grad_snr series: a million windows through
  // append would take minutes and measure table 3 again.
  const db = tuned(path);
  const sid = (db.prepare("SELECT id FROM series WHERE run_id = 'long' AND scope = 'network' AND metric = 'grad_snr'").get() as { id: number }).id;
  const ins = db.prepare('INSERT INTO points (series_id, step, value) VALUES (?, ?, ?)');
  const rng = xorshift32(99);
  db.transaction(() => {
    let y = 0;
    for (let i = 1; i < s.longSeries; i++) {
      y += rng() - 0.5;
      ins.run(sid, (i + 1) * STEPS_PER_WINDOW, y);
    }
  })();
  db.pragma('wal_checkpoint(TRUNCATE)');
  const full = db.prepare('SELECT step, value FROM points WHERE series_id = ? ORDER BY step');
  const fullArrays = db.prepare('SELECT step, value FROM points WHERE series_id = ? ORDER BY step').raw();
  const reader = openStore(path, { readonly: true });
  let n = 0;
  const rawMs = timeMedian(() => (n = full.all(sid).length), 5, 1);
  const rawArraysMs = timeMedian(() => fullArrays.all(sid), 5, 1);
  let kept = 0;
  const lttbMs = timeMedian(() => (kept = reader.series('long', 'grad_snr', { points: 2000 }).length), 5, 1);
  const allMs = timeMedian(() => reader.series('long', 'grad_snr'), 5, 1);
  const rangeMs = timeMedian(() => reader.series('long', 'grad_snr', { from: 4_000_000 * (s.longSeries / 1_000_000), to: 4_800_000 * (s.longSeries / 1_000_000), points: 2000 }), 5, 1);
  reader.close();
  db.close();
  printTable(
    `Table 4. One series of ${fmtInt(n)} points`,
    ['read', 'ms (median of 5)', 'ratio'],
    [
      ['raw full read: SELECT step, value … ORDER BY step, .all()', fmtMs(rawMs), '1 (base)'],
      ['raw full read, rows as arrays: .raw().all()', fmtMs(rawArraysMs), fmtRatio(rawArraysMs / rawMs)],
      [`Store.series(…, { points: 2000 }) → ${kept} points (LTTB)`, fmtMs(lttbMs), fmtRatio(lttbMs / rawMs)],
      ['Store.series(…) all points, as objects', fmtMs(allMs), fmtRatio(allMs / rawMs)],
      ['Store.series(…, 10% step range, points: 2000)', fmtMs(rangeMs), fmtRatio(rangeMs / rawMs)],
    ],
    ['The Store reads steps and values as two plucked columns (no object per row), then runs LTTB over typed arrays.'],
  );
}

// ---------------------------------------------------------------------------------------------
// Table 5: a large store opened and listed

function bigTable(dir: string, s: Settings): void {
  const path = join(dir, 'big.db');
  const perRun = Math.ceil(s.bigPoints / s.bigRuns);
  const run0 = benchRun('r0');
  const perWindow = entries(benchWindows(run0, 1, 1)[0]!).filter((e) => e[4] !== null).length;
  const windowsPerRun = Math.ceil(perRun / perWindow);
  progress(`table 5: building ${fmtInt(s.bigPoints)} points (${s.bigRuns} runs × ${fmtInt(windowsPerRun)} windows); this takes a while`);
  const store = openStore(path);
  // Each run's first window goes through the store, creating its series; the bulk is written series
  // by series with raw inserts (the fastest way to build the file; the layout does not matter here).
  const buildMs = time(() => {
    for (let r = 0; r < s.bigRuns; r++) {
      const run = benchRun(`run-${String(r).padStart(3, '0')}-${'x'.repeat(28)}`, 1_700_000_000_000 + r * 3_600_000);
      store.beginRun(run);
      const [w] = benchWindows(run, 1, r + 1);
      store.append([
        { type: 'window', window: w! },
        { type: 'end', run: run.id, status: 'finished', step: windowsPerRun * STEPS_PER_WINDOW, time: run.started_at + 3_000_000 },
      ]);
    }
    store.close();
    const db = tuned(path);
    const series = db.prepare('SELECT id, run_id FROM series').all() as { id: number; run_id: string }[];
    const insPoint = db.prepare('INSERT INTO points (series_id, step, value) VALUES (?, ?, ?)');
    const insWindow = db.prepare(
      "INSERT INTO windows (run_id, idx, first_step, step, epoch, batches, batch_size, batches_per_epoch, pass_batches, snr_floor, time) VALUES (?, ?, ?, ?, 0, 8, 32, 128, '[8]', 0.33, ?)",
    );
    const rng = xorshift32(5);
    for (let r = 0; r < s.bigRuns; r++) {
      const runId = `run-${String(r).padStart(3, '0')}-${'x'.repeat(28)}`;
      db.transaction(() => {
        for (let i = 1; i < windowsPerRun; i++) insWindow.run(runId, i, i * 8 + 1, (i + 1) * 8, i);
        for (const sr of series) if (sr.run_id === runId) for (let i = 1; i < windowsPerRun; i++) insPoint.run(sr.id, (i + 1) * 8, rng());
      })();
      db.prepare('UPDATE runs SET window_count = ?, last_step = ? WHERE id = ?').run(windowsPerRun, windowsPerRun * 8, runId);
    }
    db.pragma('wal_checkpoint(TRUNCATE)');
    db.close();
  });
  const check = new Database(path, { readonly: true });
  const points = (check.prepare('SELECT count(*) AS n FROM points').get() as { n: number }).n;
  check.close();
  const size = statSync(path).size;
  let listed = 0;
  const roMs = timeMedian(() => {
    const st = openStore(path, { readonly: true });
    listed = st.runs().length;
    st.close();
  }, 7, 1);
  const rwMs = timeMedian(() => {
    const st = openStore(path);
    st.runs();
    st.close();
  }, 7, 1);
  const reader = openStore(path, { readonly: true });
  const someRun = reader.runs()[0]!.id;
  const showMs = timeMedian(() => {
    const d = reader.resolveRun(someRun.slice(0, 8));
    reader.series(d.id, 'grad_snr', { layer: 'dense_Dense3', points: 2000 });
  }, 7, 1);
  reader.close();
  printTable(
    `Table 5. A store of ${fmtInt(points)} points, ${(size / 1e6).toFixed(0)} MB, ${s.bigRuns} runs (built in ${(buildMs / 1000).toFixed(1)} s)`,
    ['operation', 'ms (median of 7)'],
    [
      [`openStore(readonly) + runs() → ${listed} runs + close`, fmtMs(roMs)],
      ['openStore() (writable) + runs() + close', fmtMs(rwMs)],
      ['resolveRun(id prefix) + series(layer, points: 2000)', fmtMs(showMs)],
    ],
    ['Warm page cache (the file was just written). Runs carry their window count and last step, so listing reads no points.'],
  );
}

// ---------------------------------------------------------------------------------------------

function main(): void {
  const s = readSettings();
  if (s === null) return;
  const dir = mkdtempSync(join(tmpdir(), 'tidemark-bench-store-'));
  const t0 = performance.now();
  console.log(`tidemark store bench${s.quick ? ' (--quick)' : ''}: better-sqlite3 ${readVersion()}, SQLite ${sqliteVersion()}, Node ${process.version}`);
  try {
    layoutTable(dir, s);
    variablesTable(dir, s);
    ingestTable(dir, s);
    downsampleTable(dir, s);
    bigTable(dir, s);
  } finally {
    rmSync(dir, { recursive: true, force: true });
  }
  console.log(`\nTotal ${((performance.now() - t0) / 1000).toFixed(0)} s.`);
}

function readVersion(): string {
  const require = createRequire(import.meta.url);
  return (JSON.parse(readFileSync(require.resolve('better-sqlite3/package.json'), 'utf8')) as { version: string }).version;
}

function sqliteVersion(): string {
  const db = new Database(':memory:');
  const v = (db.prepare('SELECT sqlite_version() AS v').get() as { v: string }).v;
  db.close();
  return v;
}

main();
