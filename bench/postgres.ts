/**
 * What the PostgreSQL store costs: ingest through PostgresStore.append against raw writes of the same rows
 * into a bare points-shaped table, and the live delay with two servers on one database. Prints tables
 * measured side by side in one run; it asserts nothing. A throwaway cluster is started for the run
 * (test/helpers/postgres.ts) and removed at the end; without PostgreSQL server binaries the bench prints a
 * note and exits 0.
 *
 *   node --import tsx bench/postgres.ts            # about 2½ minutes on a shared 2-core machine
 *   node --import tsx bench/postgres.ts --quick    # fewer windows, rounds and seconds, about 50 s
 *
 * Tables:
 *  1. Ingest: points/s stored by PostgresStore.append (1, 10 and 50 windows per call, one call after another
 *     as a sink sends them) against (a) one multi-row INSERT per call and (b) one COPY per call of the same
 *     (series_id, step, value) rows into a bare table shaped like the store's `points` (same columns, same
 *     composite primary key); interleaved rounds, the order rotating. The ratio is store ÷ raw, per round.
 *     The SQLite store's counterpart is bench/store.ts Table 3 (target ≥ 0.7× raw inserts); not repeated here.
 *  2. Live delay with two `tidemark serve` children on one database: writers send to server A (1 writer at 20
 *     windows/s, 4 at 5/s, 4 at 1/s; one window per batch); 20 viewers follow on server B (another server) or
 *     on server A (the same server). The delay runs from the writer receiving the ack of a window's batch to a
 *     viewer receiving the window; target p99 ≤ 100 ms. The servers poll the store every 250 ms (their
 *     default; `tidemark serve` has no flag for it), and only an ingest on the same server nudges a poll.
 */
import { quickFlag } from './quick-flag.js';
import { once } from 'node:events';
import { readFileSync } from 'node:fs';
import { createRequire } from 'node:module';
import { cpus } from 'node:os';
import { finished } from 'node:stream/promises';
import pg from 'pg';
import copyStreams from 'pg-copy-streams';
import WebSocket from 'ws';
import { AckingWriter } from './acking-writer.js';
import { windowPoints } from '../src/protocol/points.js';
import type { RunInfo, SinkRecord, WindowRecord } from '../src/protocol/records.js';
import { openPostgresStore, type PostgresStore } from '../src/storage/postgres-store.js';
import { checkWindow } from '../src/storage/record-check.js';
import { encodeJson } from '../src/storage/sink.js';
import { postgresMissing, startPostgres, type PgCluster } from '../test/helpers/postgres.js';
import { freePort, startServerChild, type ServerChild } from '../test/helpers/server-child.js';
import { benchRun, benchWindows, LAYERS } from './bench-runs.js';
import { fmtInt, fmtMs, fmtRatio, median, printTable, progress, quantile } from './report.js';
import { xorshift32 } from './seeded-data.js';

const USAGE = `usage: node --import tsx bench/postgres.ts [--quick]
  --quick   fewer windows, rounds and seconds (tables keep their shape; figures are noisier)`;

interface Settings {
  quick: boolean;
  /** Table 1: windows per measurement, and interleaved rounds. */
  ingestWindows: number;
  rounds: number;
  /** Table 2: seconds of windows per row. */
  liveSeconds: number;
}

function readSettings(): Settings | null {
  const q = quickFlag(USAGE);
  if (q === null) return null;
  return { quick: q, ingestWindows: q ? 50 : 100, rounds: q ? 2 : 3, liveSeconds: q ? 3 : 8 };
}

// ---------------------------------------------------------------------------------------------
// Records: a model of 10 dense layers (kernel + bias), windows of 8 minibatches, as in bench/server.ts.

const BATCH_SIZES = [1, 10, 50];
const VIEWERS = 20;
/** Table 2's loads on server A: writers × windows a second each, one window per batch (20 a second as in bench/server.ts). */
const LOADS: readonly [writers: number, perSecond: number][] = [
  [1, 20],
  [4, 5],
  [4, 1],
];
/** The server's default poll interval (src/server/app.ts `pollMs`); `tidemark serve` has no flag for it. */
const POLL_MS = 250;


// ---------------------------------------------------------------------------------------------
// Helpers


const fmtRange = (xs: readonly number[]): string => `${fmtRatio(Math.min(...xs))}–${fmtRatio(Math.max(...xs))}`;
const sleep = (ms: number): Promise<void> => new Promise((r) => setTimeout(r, ms));

function packageVersion(name: string): string {
  const require = createRequire(import.meta.url);
  return (JSON.parse(readFileSync(require.resolve(`${name}/package.json`), 'utf8')) as { version: string }).version;
}

// ---------------------------------------------------------------------------------------------
// Table 1: ingest through PostgresStore.append against raw INSERT and COPY of the same rows

/** The bare table the raw writers fill: the store's `points`, nothing else. */
const rawTable = (name: string): string => `CREATE TABLE bench_raw.${name} (
  series_id  bigint NOT NULL,
  step       double precision NOT NULL,
  value      double precision NOT NULL,
  PRIMARY KEY (series_id, step)
)`;

/** Bind parameters one statement may carry (the protocol counts them in 16 bits). */
const MAX_PARAMS = 65_535;

/**
 * The (series_id, step, value) rows the store writes for these windows, in its order: the points the record
 * check extracts (src/storage/record-check.ts), one series id per (scope, layer, variable, metric) of a run,
 * and no row for a null value. Ids come from `nextId`, so each run's rows are new keys in the raw tables.
 */
function pointRows(windows: readonly WindowRecord[], nextId: () => number): number[][] {
  const ids = new Map<string, number>();
  return windows.map((w, i) => {
    const flat: number[] = [];
    for (const p of checkWindow(w, i).points) {
      const key = `${p.scope}\0${p.layer ?? ''}\0${p.variable ?? ''}\0${p.metric}`;
      let id = ids.get(key);
      if (id === undefined) ids.set(key, (id = nextId()));
      if (p.value !== null) flat.push(id, w.step, p.value);
    }
    return flat;
  });
}

/** Splits `xs` into consecutive groups of `size`. */
function groups<T>(xs: readonly T[], size: number): T[][] {
  const out: T[][] = [];
  for (let i = 0; i < xs.length; i += size) out.push(xs.slice(i, i + size));
  return out;
}

interface Timed {
  ms: number;
  points: number;
}

/** Store.append of the windows, `perCall` per call, one call after another (the run begun first, untimed). */
async function ingestStore(store: PostgresStore, run: RunInfo, windows: readonly WindowRecord[], perCall: number): Promise<Timed> {
  await store.beginRun(run);
  const calls = groups(
    windows.map((window): SinkRecord => ({ type: 'window', window })),
    perCall,
  );
  const t0 = performance.now();
  for (const records of calls) await store.append(records);
  const ms = performance.now() - t0;
  return { ms, points: windows.reduce((a, w) => a + windowPoints(w), 0) };
}

/**
 * One multi-row INSERT per call (split into statements of at most MAX_PARAMS parameters, in one transaction,
 * when a call holds more rows than that). Statement texts and parameter arrays are built before the clock.
 */
async function ingestInsert(client: pg.Client, table: string, rows: readonly number[][], perCall: number): Promise<Timed> {
  const maxRows = Math.floor(MAX_PARAMS / 3);
  const calls = groups(rows, perCall).map((g) => {
    const flat = g.flat();
    const statements: { text: string; values: number[] }[] = [];
    for (let r = 0; r < flat.length / 3; r += maxRows) {
      const values = flat.slice(r * 3, (r + maxRows) * 3);
      const tuples: string[] = [];
      for (let k = 0; k < values.length / 3; k++) tuples.push(`($${3 * k + 1},$${3 * k + 2},$${3 * k + 3})`);
      statements.push({ text: `INSERT INTO bench_raw.${table} (series_id, step, value) VALUES ${tuples.join(',')}`, values });
    }
    return statements;
  });
  let points = 0;
  for (const c of calls) for (const s of c) points += s.values.length / 3;
  const t0 = performance.now();
  for (const statements of calls) {
    if (statements.length === 1) await client.query(statements[0]!);
    else {
      await client.query('BEGIN');
      for (const s of statements) await client.query(s);
      await client.query('COMMIT');
    }
  }
  return { ms: performance.now() - t0, points };
}

/** One COPY … FROM STDIN (text format) per call, through pg-copy-streams; the text is built before the clock. */
async function ingestCopy(client: pg.Client, table: string, rows: readonly number[][], perCall: number): Promise<Timed> {
  const sql = `COPY bench_raw.${table} (series_id, step, value) FROM STDIN`;
  let points = 0;
  const calls = groups(rows, perCall).map((g) => {
    const lines: string[] = [];
    for (const flat of g) for (let k = 0; k < flat.length; k += 3) lines.push(`${flat[k]}\t${flat[k + 1]}\t${flat[k + 2]}\n`);
    points += lines.length;
    return Buffer.from(lines.join(''));
  });
  const t0 = performance.now();
  for (const text of calls) {
    const stream = client.query(copyStreams.from(sql));
    stream.end(text);
    await finished(stream);
  }
  return { ms: performance.now() - t0, points };
}

type Path = 'store' | 'insert' | 'copy';
const PATHS: readonly Path[] = ['store', 'insert', 'copy'];

async function ingestTable(cluster: PgCluster, s: Settings): Promise<void> {
  const url = cluster.urlOf('bench_ingest');
  const store = await openPostgresStore(url, { schema: 'bench_store' });
  const client = new pg.Client({ connectionString: url });
  await client.connect();
  await client.query('CREATE SCHEMA bench_raw');
  await client.query(rawTable('points_insert'));
  await client.query(rawTable('points_copy'));
  let nextId = 1;
  const newId = (): number => nextId++;
  const rows: string[][] = [];
  let rotation = 0;
  const mismatches: string[] = [];
  try {
    // Warm-up: every path once, untimed.
    {
      const run = benchRun('warm');
      const ws = benchWindows(run, 40, 99);
      await ingestStore(store, run, ws, 5);
      await ingestInsert(client, 'points_insert', pointRows(ws, newId), 5);
      await ingestCopy(client, 'points_copy', pointRows(ws, newId), 5);
    }
    for (const perCall of BATCH_SIZES) {
      const rates: Record<Path, number[]> = { store: [], insert: [], copy: [] };
      const vsInsert: number[] = [];
      const vsCopy: number[] = [];
      const storeMs: number[] = [];
      let points = 0;
      for (let r = 0; r < s.rounds; r++) {
        progress(`ingest: ${perCall} window(s) per call, round ${r + 1}/${s.rounds}`);
        const run = benchRun(`ingest-${perCall}-${r}`);
        const windows = benchWindows(run, s.ingestWindows, 1000 + r);
        // Rotate the order, so no path always gets the warmer (or the more crowded) machine.
        const order = PATHS.map((_, k) => PATHS[(k + rotation) % PATHS.length]!);
        rotation++;
        const got = {} as Record<Path, Timed>;
        for (const path of order) {
          await client.query('CHECKPOINT');
          if (path === 'store') got.store = await ingestStore(store, run, windows, perCall);
          else if (path === 'insert') got.insert = await ingestInsert(client, 'points_insert', pointRows(windows, newId), perCall);
          else got.copy = await ingestCopy(client, 'points_copy', pointRows(windows, newId), perCall);
        }
        const stored = Number(
          (
            await client.query<{ n: string }>('SELECT count(*) AS n FROM bench_store.points WHERE series_id IN (SELECT id FROM bench_store.series WHERE run_id = $1)', [
              run.id,
            ])
          ).rows[0]!.n,
        );
        if (stored !== got.store.points || got.insert.points !== stored || got.copy.points !== stored) {
          mismatches.push(`${run.id}: windows hold ${got.store.points} points; the store holds ${stored}, INSERT wrote ${got.insert.points}, COPY ${got.copy.points}`);
        }
        points = got.store.points;
        storeMs.push(got.store.ms);
        for (const p of PATHS) rates[p].push(got[p].points / (got[p].ms / 1000));
        vsInsert.push(rates.store.at(-1)! / rates.insert.at(-1)!);
        vsCopy.push(rates.store.at(-1)! / rates.copy.at(-1)!);
      }
      const calls = Math.ceil(s.ingestWindows / perCall);
      rows.push([
        `${perCall} window${perCall === 1 ? '' : 's'} per call (${fmtInt(calls)} call${calls === 1 ? '' : 's'})`,
        fmtInt(points),
        fmtMs(median(storeMs) / s.ingestWindows),
        fmtInt(median(rates.store)),
        fmtInt(median(rates.insert)),
        fmtInt(median(rates.copy)),
        `${fmtRatio(median(vsInsert))} (${fmtRange(vsInsert)}) ${median(vsInsert) >= 0.5 ? 'PASS' : 'OVER'}`,
        `${fmtRatio(median(vsCopy))} (${fmtRange(vsCopy)}) ${median(vsCopy) >= 0.5 ? 'PASS' : 'OVER'}`,
      ]);
    }
    const perWindow = windowPoints(benchWindows(benchRun('count'), 20, 1)[19]!);
    printTable(
      `Table 1. Ingest: points/s, PostgresStore.append against raw writes of the same rows into a bare points table (${s.rounds} rounds, median)`,
      ['calls', 'points', 'store ms/window', 'store pts/s', 'INSERT pts/s', 'COPY pts/s', 'store ÷ INSERT (range) ≥ 0.5', 'store ÷ COPY (range) ≥ 0.5'],
      rows,
      [
        `${fmtInt(s.ingestWindows)} windows of a ${LAYERS}-layer model (kernel + bias each, about ${perWindow} points per window) per measurement; a fresh run each time; every table grows alike over the rounds.`,
        'store: PostgresStore.append, one call after another (checks, JSON encoding, one round trip to append_records, which writes the window row, series, points and run counters).',
        'INSERT: one multi-row INSERT … VALUES statement per call, autocommit, one pg.Client; statement text and parameters built before the clock.',
        'COPY: one COPY … FROM STDIN (text format, pg-copy-streams) per call, autocommit; the text built before the clock.',
        'Raw tables: (series_id bigint, step float8, value float8, PRIMARY KEY (series_id, step)) in their own schema, the rows the store writes (null values left out).',
        'Ratios are store ÷ raw within one round, median and range over rounds; PASS/OVER against the 0.5 target. A CHECKPOINT precedes every measurement.',
        'The cluster runs with fsync, synchronous_commit and full_page_writes off (a throwaway test cluster): a commit costs no disk flush, for every path alike.',
        'SQLite: bench/store.ts Table 3 measures Store.append against raw better-sqlite3 inserts (target ≥ 0.7); not repeated here.',
        ...(mismatches.length > 0 ? mismatches.map((m) => `Point count mismatch: ${m}.`) : ['Every measurement wrote the same number of points on all three paths (checked by count).']),
      ],
    );
  } finally {
    await client.end();
    await store.close();
  }
}

// ---------------------------------------------------------------------------------------------
// Table 2: live delay, two servers on one database


/**
 * A viewer following one run on one server (test/server/multi-server.test.ts's Follower, without the
 * reconnecting: no server is killed here): notes when each live window arrives. Backfilled windows are not
 * timed.
 */
class Follower {
  readonly got = new Map<number, number>();
  backfilled = false;
  duplicates = 0;
  gaps = 0;
  readonly errors: string[] = [];

  private constructor(readonly ws: WebSocket) {
    ws.on('message', (data) => {
      const at = performance.now();
      const m = JSON.parse(String(data)) as { type: string; window?: { index: number }; code?: string };
      if (m.type === 'window' && m.window !== undefined) {
        if (this.got.has(m.window.index)) this.duplicates++;
        else this.got.set(m.window.index, at);
      } else if (m.type === 'backfill') this.backfilled = true;
      else if (m.type === 'gap') this.gaps++;
      else if (m.type === 'error') this.errors.push(m.code ?? 'error');
    });
  }

  static async open(url: string, runId: string): Promise<Follower> {
    const ws = new WebSocket(`${url}/live`);
    const f = new Follower(ws);
    await Promise.race([once(ws, 'open'), once(ws, 'error').then(([e]) => Promise.reject(e as Error))]);
    ws.send(encodeJson({ v: 1, type: 'subscribe', run: runId }));
    return f;
  }
}

interface LiveRow {
  cells: string[];
  p99: number;
}

/**
 * `writers` writers on server A sending `rate` windows a second each, and VIEWERS viewers (spread evenly over
 * the writers' runs) on `viewerServer`.
 */
async function liveRow(a: ServerChild, viewerServer: ServerChild, where: string, writers: number, rate: number, s: Settings, tag: string): Promise<LiveRow> {
  const count = Math.round(s.liveSeconds * rate);
  progress(`live: ${writers} writer(s) on A at ${rate}/s each, ${VIEWERS} viewers on ${where}, ${s.liveSeconds} s`);
  const runs = Array.from({ length: writers }, (_, i) => benchRun(`live-${tag}-${i}`));
  const windows = runs.map((run, i) => benchWindows(run, count, 7 + i));
  const ws: AckingWriter[] = [];
  for (const run of runs) ws.push(await AckingWriter.open(a.ws, run));
  const viewers: { f: Follower; writer: number }[] = [];
  for (let i = 0; i < VIEWERS; i++) viewers.push({ f: await Follower.open(viewerServer.ws, runs[i % writers]!.id), writer: i % writers });
  for (let t = Date.now(); Date.now() - t < 10_000 && !viewers.every((v) => v.f.backfilled); ) await sleep(10);
  // Server B learns of a run at its next poll: let both servers see the runs before the clock starts.
  await sleep(2 * POLL_MS);
  const t0 = performance.now();
  await Promise.all(
    ws.map(async (w, k) => {
      // Gaps of 0.5–1.5 times the mean (seeded), so that sends do not lock in phase with B's poll timer.
      const rng = xorshift32(31 + k);
      let due = t0 + (k * 1000) / rate / writers;
      for (let i = 0; i < count; i++) {
        if (i > 0) due += (1000 / rate) * (0.5 + rng());
        const wait = due - performance.now();
        if (wait > 0) await sleep(wait);
        w.send(i + 1, [{ type: 'window', window: windows[k]![i]! }]);
      }
    }),
  );
  // A server that stores slower than the writers send acks late: wait for every ack, then for the viewers.
  for (let t = Date.now(); Date.now() - t < 120_000 && !ws.every((w) => w.ackAt.size > count); ) await sleep(10);
  const complete = (): boolean => viewers.every((v) => v.f.got.size >= count);
  for (let t = Date.now(); Date.now() - t < 3000 && !complete(); ) await sleep(10);
  const sendSeconds = (Math.max(...ws.map((w) => w.sentAt.get(count) ?? t0)) - t0) / 1000;
  const ackSeconds = (Math.max(...ws.map((w) => w.ackAt.get(count) ?? Number.NaN)) - t0) / 1000;
  const afterAck: number[] = [];
  const afterSend: number[] = [];
  const ackRtt: number[] = [];
  for (const [k, w] of ws.entries()) {
    for (let i = 0; i < count; i++) {
      const sent = w.sentAt.get(i + 1)!;
      const ack = w.ackAt.get(i + 1);
      if (ack !== undefined) ackRtt.push(ack - sent);
      for (const v of viewers) {
        if (v.writer !== k) continue;
        const at = v.f.got.get(i);
        if (at === undefined) continue;
        if (ack !== undefined) afterAck.push(at - ack);
        afterSend.push(at - sent);
      }
    }
  }
  for (const xs of [afterAck, afterSend, ackRtt]) xs.sort((x, y) => x - y);
  const delivered = viewers.reduce((n, v) => n + v.f.got.size, 0);
  const problems =
    viewers.reduce((n, v) => n + v.f.duplicates + v.f.gaps + v.f.errors.length, 0) + ws.reduce((n, w) => n + w.errors.length, 0);
  for (const v of viewers) v.f.ws.terminate();
  for (const w of ws) w.close();
  const p99 = quantile(afterAck, 0.99);
  return {
    p99,
    cells: [
      `${writers} × ${rate}/s → A, viewers on ${where}`,
      `${fmtInt(delivered)}/${fmtInt(count * VIEWERS)}`,
      fmtMs(quantile(afterAck, 0.5)),
      fmtMs(p99),
      fmtMs(quantile(afterAck, 1)),
      fmtMs(quantile(ackRtt, 0.5)),
      fmtMs(quantile(ackRtt, 0.99)),
      `${sendSeconds.toFixed(1)} / ${ackSeconds.toFixed(1)}`,
      String(problems),
      p99 <= 100 ? 'PASS' : `OVER by ${fmtMs(p99 - 100)}`,
    ],
  };
}

async function liveTable(cluster: PgCluster, s: Settings): Promise<void> {
  // Its own database, so the servers' polls read only these runs.
  const db = cluster.urlOf('bench_live');
  const stderr: string[] = [];
  const a = await startServerChild(db, { port: await freePort(), stderr });
  const b = await startServerChild(db, { port: await freePort(), stderr });
  const rows: LiveRow[] = [];
  try {
    let n = 0;
    for (const [writers, rate] of LOADS) {
      rows.push(await liveRow(a, b, 'B', writers, rate, s, String(n++)));
      rows.push(await liveRow(a, a, 'A', writers, rate, s, String(n++)));
    }
  } finally {
    await a.stop();
    await b.stop();
  }
  printTable(
    `Table 2. Live delay, two servers on one PostgreSQL database: a window's batch acknowledged to its writer (on A) → the window at a viewer (${VIEWERS} viewers, ${s.liveSeconds} s of windows per row, one window per batch)`,
    ['writers × windows/s, viewers on', 'delivered', 'ack→view p50 ms', 'p99', 'max', 'send→ack p50', 'p99', 'last sent / acked s', 'dup+gap+err', 'p99 ≤ 100'],
    rows.map((r) => r.cells),
    [
      `Two \`tidemark serve --db postgres://…\` children on one database, default settings (poll every ${POLL_MS} ms); a bare /ingest client per writer notes each ack; ${VIEWERS} /live viewers spread evenly over the writers' runs. Writers and viewers share this process and its clock.`,
      'Each writer spaces its windows 0.5–1.5 times its mean interval at random (seeded), so sends do not fall at one fixed phase of the servers\' poll timers.',
      'send→ack: the writer sending a batch to its ack. It grows through a row when A stores slower than the windows come (Table 1), and then A\'s database is busy on both cores.',
      'Viewers on A: A stores the batch, acks it, and its watcher, nudged by the ingest, reads the new window back and sends it at once.',
      `Viewers on B: the store's function notifies the database channel tidemark_store at commit; B listens on it and reads what is new at once (its poll every ${POLL_MS} ms remains the fallback).`,
      ...(stderr.length > 0 ? [`Server stderr: ${stderr.join('').trim().slice(0, 500)}`] : []),
    ],
  );
}

// ---------------------------------------------------------------------------------------------

async function main(): Promise<void> {
  const s = readSettings();
  if (s === null) return;
  const cores = cpus();
  const machine = `Node ${process.version}, ${cores.length} cores (${cores[0]?.model.trim() ?? '?'})`;
  if (postgresMissing !== null) {
    console.log(`tidemark PostgreSQL bench: ${machine}\n\nSkipped: ${postgresMissing}.`);
    return;
  }
  const t0 = performance.now();
  progress('starting a throwaway PostgreSQL cluster');
  const cluster = await startPostgres();
  // Ctrl-C must not leave the cluster running (the server children get the signal themselves).
  const interrupted = (): void => {
    cluster.stop();
    process.exit(130);
  };
  process.once('SIGINT', interrupted);
  try {
    const admin = new pg.Client({ connectionString: cluster.url });
    await admin.connect();
    const version = (await admin.query<{ server_version: string }>('SHOW server_version')).rows[0]!.server_version;
    await admin.query('CREATE DATABASE bench_ingest');
    await admin.query('CREATE DATABASE bench_live');
    await admin.end();
    console.log(
      `tidemark PostgreSQL bench${s.quick ? ' (--quick)' : ''}: ${machine}, PostgreSQL ${version} (throwaway cluster on loopback, fsync off), pg ${packageVersion('pg')}, pg-copy-streams ${packageVersion('pg-copy-streams')}`,
    );
    await ingestTable(cluster, s);
    await liveTable(cluster, s);
  } finally {
    process.off('SIGINT', interrupted);
    cluster.stop();
  }
  console.log(`\nTotal ${((performance.now() - t0) / 1000).toFixed(0)} s.`);
}

await main();
