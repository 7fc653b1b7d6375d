/**
 * The Store contract, run on every backend through the asynchronous interface (AsyncStore): the same
 * tests, the same expected values, the same error codes. The SQLite store is the reference; what it
 * answers here is what every other backend must answer. Nothing file- or server-specific is asserted.
 */
import { mkdtempSync, rmSync } from 'node:fs';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import { afterAll, afterEach, beforeAll, describe, expect, it } from 'vitest';
import { lttb } from '../../src/analysis/lttb.js';
import { markerKey, withoutVariables, type Marker, type RunInfo, type SinkRecord, type WindowRecord } from '../../src/protocol/records.js';
import { asAsyncStore, type AsyncStore } from '../../src/storage/async-store.js';
import { encodeRecord } from '../../src/storage/sink.js';
import { openPostgresStore } from '../../src/storage/postgres-store.js';
import { openStore } from '../../src/storage/sqlite-store.js';
import type { SeriesKey } from '../../src/storage/store.js';
import { postgresMissing, startPostgres, type PgCluster } from '../helpers/postgres.js';
import { fakeMarkers, fakeRun, fakeWindows } from '../helpers/window-records.js';

// Backends

type OpenOptions = { readonly?: boolean; staleAfterMs?: number; now?: () => number };

interface Backend {
  name: AsyncStore['backend'];
  skip: string | null; // why this backend cannot run here, or null
  setup(): Promise<void>;
  teardown(): void;
  place(): string; // a fresh, empty place for a store: a file path or a schema name
  open(place: string, options: OpenOptions): Promise<AsyncStore>;
}

let sqliteDir = '';
let fileNo = 0;
const sqlite: Backend = {
  name: 'sqlite',
  skip: null,
  setup: async () => void (sqliteDir = mkdtempSync(join(tmpdir(), 'tidemark-conformance-'))),
  teardown: () => rmSync(sqliteDir, { recursive: true, force: true }),
  place: () => join(sqliteDir, `s${fileNo++}.db`),
  open: async (place, options) => asAsyncStore(openStore(place, options)),
};

let cluster: PgCluster | null = null;
let schemaNo = 0;
const postgres: Backend = {
  name: 'postgres',
  skip: postgresMissing,
  setup: async () => void (cluster = await startPostgres()),
  teardown: () => cluster?.stop(),
  // One schema per store: the tests share one cluster and stay independent.
  place: () => `t_${schemaNo++}`,
  open: async (place, options) => {
    return openPostgresStore(cluster!.url, { ...options, schema: place });
  },
};

// Helpers

const RUN_ID = 'a1b2c3d4-0000-4000-8000-000000000001';
const T0 = 1_800_000_000_000;

const windowRecs = (ws: WindowRecord[]): SinkRecord[] => ws.map((window) => ({ type: 'window', window }));
const markerRecs = (ms: Marker[]): SinkRecord[] => ms.map((marker) => ({ type: 'marker', marker }));

/** Expects `p` to reject with this code, and (where given) a message matching `message`. */
async function rejects(p: Promise<unknown>, code: string, message?: RegExp): Promise<void> {
  await expect(p).rejects.toMatchObject(message === undefined ? { code } : { code, message: expect.stringMatching(message) });
}

/** A clock the test moves by hand. */
function fakeClock(start = T0): { now: () => number; advance(ms: number): void; t(): number } {
  let t = start;
  return { now: () => t, advance: (ms) => void (t += ms), t: () => t };
}

/** Every series key the windows imply, as `scope/layer/metric`: network, layers, variables, logs, and the window fields. */
function expectedKeys(ws: WindowRecord[]): Set<string> {
  const keys = new Set<string>();
  for (const w of ws) {
    for (const m of Object.keys(w.network)) keys.add(`network//${m}`);
    for (const [layer, stats] of Object.entries(w.layers)) {
      for (const m of Object.keys(stats)) if (m !== 'variables') keys.add(`layer/${layer}/${m}`);
      for (const [v, vs] of Object.entries(stats.variables ?? {})) for (const m of Object.keys(vs)) keys.add(`variable/${v}/${m}`);
    }
    for (const m of [...Object.keys(w.logs), 'snr_floor', 'epoch', 'batch_size']) keys.add(`run//${m}`);
  }
  return keys;
}

const keyOf = (k: SeriesKey): string => `${k.scope}/${k.layer ?? ''}/${k.metric}`;

const NOISE_MEASURED = { status: 'measured' as const, reason: null, groups: 8, group_rows: 32, rows: 256, population: 2000, ms: 12.5 };
const NOISE_FAILED = { status: 'failed' as const, reason: 'gradients were not finite', groups: 4, group_rows: 16, rows: 64, population: null, ms: 3 };

/** The window with a noise measurement, its key after `time` where the record type declares it. */
function withNoise(w: WindowRecord, noise: NonNullable<WindowRecord['noise']>): WindowRecord {
  const { layers, network, logs, ...head } = w;
  return { ...head, noise, layers, network, logs };
}

// The suite

for (const backend of [sqlite, postgres]) {
  const title = backend.skip === null ? `${backend.name} store: conformance` : `${backend.name} store: conformance (skipped: ${backend.skip})`;

  describe.skipIf(backend.skip !== null)(title, () => {
    beforeAll(() => backend.setup());
    afterAll(() => backend.teardown());

    const opened: AsyncStore[] = [];
    afterEach(() => Promise.allSettled(opened.splice(0).map((s) => s.close())));

    async function openAt(place: string, options: OpenOptions = {}): Promise<AsyncStore> {
      const s = await backend.open(place, options);
      opened.push(s);
      return s;
    }

    const fresh = (options: OpenOptions = {}): Promise<AsyncStore> => openAt(backend.place(), options);

    /** A store with one run of `count` windows (two of them with a noise measurement). */
    async function seeded(count = 12, options: OpenOptions = {}, place = backend.place()): Promise<{ s: AsyncStore; run: RunInfo; ws: WindowRecord[] }> {
      const s = await openAt(place, options);
      const run = fakeRun({ id: RUN_ID, name: 'gearbox-v3', group: 'depth-sweep', tags: { seed: '1' } });
      await s.beginRun(run);
      const ws = fakeWindows(run, count);
      if (count > 10) {
        ws[5] = withNoise(ws[5]!, NOISE_MEASURED);
        ws[10] = withNoise(ws[10]!, NOISE_FAILED);
      }
      await s.append(windowRecs(ws));
      return { s, run, ws };
    }

    describe('runs', () => {
      it('begins a run once: beginRun again keeps one run, its windows, layers and config', async () => {
        const clock = fakeClock();
        const { s, run, ws } = await seeded(3, { now: clock.now });
        clock.advance(1_000);
        await s.beginRun(run);
        const rows = await s.runs();
        expect(rows).toEqual([
          { id: RUN_ID, name: 'gearbox-v3', group: 'depth-sweep', tags: { seed: '1' }, status: 'running', created_at: run.started_at, ended_at: null, end_step: null, heartbeat_at: T0 + 1_000, last_step: 24, windows: 3, config: run.config },
        ]);
        expect(await s.resolveRun(RUN_ID)).toEqual({ ...rows[0], layers: run.layers });
        expect(await s.windows(RUN_ID)).toEqual(ws);
      });

      it('lists runs newest first, filtered by name substring (any case), group, every tag, status and limit', async () => {
        const clock = fakeClock();
        const s = await fresh({ now: clock.now });
        const mk = (id: string, name: string, t: number, group: string | null, tags: Record<string, string>): Promise<void> =>
          s.beginRun(fakeRun({ id, name, group, tags, started_at: t }));
        await mk('r-0001', 'Gearbox depth 2', 1000, 'depth-sweep', { seed: '1', depth: '2' });
        await mk('r-0002', 'gearbox depth 4', 2000, 'depth-sweep', { seed: '2', depth: '4' });
        await mk('r-0003', 'iris baseline', 3000, null, { seed: '1' });
        await s.append([{ type: 'end', run: 'r-0001', status: 'finished', step: 100, time: 5000 }]);
        await s.append([{ type: 'end', run: 'r-0003', status: 'failed', step: 7, time: 6000 }]);
        const ids = async (f?: Parameters<AsyncStore['runs']>[0]): Promise<string[]> => (await s.runs(f)).map((r) => r.id);
        expect(await ids()).toEqual(['r-0003', 'r-0002', 'r-0001']);
        expect(await ids({ name: 'GEARBOX' })).toEqual(['r-0002', 'r-0001']);
        expect(await ids({ name: 'depth 4' })).toEqual(['r-0002']);
        expect(await ids({ group: 'depth-sweep' })).toEqual(['r-0002', 'r-0001']);
        expect(await ids({ group: 'depth' })).toEqual([]);
        expect(await ids({ tags: { seed: '1' } })).toEqual(['r-0003', 'r-0001']);
        expect(await ids({ tags: { seed: '1', depth: '2' } })).toEqual(['r-0001']);
        expect(await ids({ tags: { seed: '1', depth: '4' } })).toEqual([]);
        expect(await ids({ tags: { seed: '11' } })).toEqual([]);
        expect(await ids({ group: 'depth-sweep', tags: { seed: '1' } })).toEqual(['r-0001']);
        expect(await ids({ status: 'finished' })).toEqual(['r-0001']);
        expect(await ids({ status: 'failed' })).toEqual(['r-0003']);
        expect(await ids({ status: 'running' })).toEqual(['r-0002']);
        expect(await ids({ limit: 2 })).toEqual(['r-0003', 'r-0002']);
        expect(await ids({ name: 'gearbox', limit: 1 })).toEqual(['r-0002']);
        clock.advance(30_001);
        expect(await ids({ status: 'interrupted' })).toEqual(['r-0002']);
        expect(await ids({ status: 'running' })).toEqual([]);
      });

      it('rejects a bad filter: wrong values with TIDEMARK_ERR_OPTION_INVALID, misspelt keys with TIDEMARK_ERR_OPTION_UNKNOWN', async () => {
        const s = await fresh();
        await rejects(s.runs({ status: 'done' as never }), 'TIDEMARK_ERR_OPTION_INVALID', /'status' must be running, finished, failed, interrupted; received "done"/);
        await rejects(s.runs({ limit: 0 }), 'TIDEMARK_ERR_OPTION_INVALID', /'limit'/);
        await rejects(s.runs({ limit: 1.5 }), 'TIDEMARK_ERR_OPTION_INVALID', /'limit'/);
        await rejects(s.runs({ name: 5 as never }), 'TIDEMARK_ERR_OPTION_INVALID', /'name'/);
        await rejects(s.runs({ tags: { seed: 1 } as never }), 'TIDEMARK_ERR_OPTION_INVALID', /'tags.seed'/);
        await rejects(s.runs({ staus: 'running' } as never), 'TIDEMARK_ERR_OPTION_UNKNOWN', /'staus' of runs. Did you mean 'status'\?/);
      });

      it('resolves a run by id, unique id prefix of 4 or more characters, or exact name', async () => {
        const s = await fresh();
        await s.beginRun(fakeRun({ id: '0f3a9c12-aaaa', name: 'alpha', started_at: 1 }));
        await s.beginRun(fakeRun({ id: '0f3b7e55-bbbb', name: 'alpha', started_at: 2 }));
        await s.beginRun(fakeRun({ id: '9d00c0de-cccc', name: 'beta', started_at: 3 }));
        expect((await s.resolveRun('0f3a9c12-aaaa')).id).toBe('0f3a9c12-aaaa');
        expect((await s.resolveRun('0f3a')).id).toBe('0f3a9c12-aaaa');
        expect((await s.resolveRun('0f3b7')).id).toBe('0f3b7e55-bbbb');
        const beta = await s.resolveRun('beta');
        expect(beta).toMatchObject({ id: '9d00c0de-cccc', name: 'beta', status: 'running', created_at: 3 });
        expect(beta.layers).toEqual(fakeRun({ id: 'x' }).layers);
        // The message lists both candidates.
        await rejects(s.resolveRun('alpha'), 'TIDEMARK_ERR_RUN_AMBIGUOUS', /^(?=[^]*0f3a9c12-aaaa)(?=[^]*0f3b7e55-bbbb)"alpha" matches 2 runs/);
        // Three characters are too few for a prefix; a name must match exactly.
        await rejects(s.resolveRun('0f3'), 'TIDEMARK_ERR_RUN_NOT_FOUND', /most recent runs:\n {2}9d00c0de-cccc {2}"beta"/);
        await rejects(s.resolveRun('ALP'), 'TIDEMARK_ERR_RUN_NOT_FOUND', /Runs with similar names:/);
        await rejects(s.resolveRun('gamma'), 'TIDEMARK_ERR_RUN_NOT_FOUND', /"gamma"/);
        await rejects((await fresh()).resolveRun('x'), 'TIDEMARK_ERR_RUN_NOT_FOUND', /The store has no runs\./);
      });

      it('reads a running run whose heartbeat is older than staleAfterMs as interrupted; a heartbeat or a window brings it back', async () => {
        const clock = fakeClock();
        const { s, run } = await seeded(2, { now: clock.now, staleAfterMs: 10_000 });
        clock.advance(9_000);
        expect((await s.resolveRun(RUN_ID)).status).toBe('running');
        clock.advance(2_000);
        expect((await s.resolveRun(RUN_ID)).status).toBe('interrupted');
        expect((await s.runs())[0]!.status).toBe('interrupted');
        await s.heartbeat(RUN_ID);
        expect(await s.resolveRun(RUN_ID)).toMatchObject({ status: 'running', heartbeat_at: clock.t() });
        clock.advance(10_001);
        expect((await s.resolveRun(RUN_ID)).status).toBe('interrupted');
        await s.append(windowRecs(fakeWindows(run, 3).slice(2)));
        expect((await s.resolveRun(RUN_ID)).status).toBe('running');
        await s.heartbeat(RUN_ID, clock.t() + 5);
        expect((await s.resolveRun(RUN_ID)).heartbeat_at).toBe(clock.t() + 5);
        await rejects(s.heartbeat('gone'), 'TIDEMARK_ERR_RUN_NOT_FOUND', /"gone"/);
      });

      it('ends a run by its end record: finished or failed, with time and step, never interrupted afterwards', async () => {
        const clock = fakeClock();
        const { s } = await seeded(2, { now: clock.now, staleAfterMs: 10_000 });
        await s.beginRun(fakeRun({ id: 'other-0001' }));
        await s.append([
          { type: 'end', run: RUN_ID, status: 'finished', step: 16, time: T0 + 9_000 },
          { type: 'end', run: 'other-0001', status: 'failed', step: 0, time: T0 + 1_000 },
        ]);
        expect(await s.resolveRun(RUN_ID)).toMatchObject({ status: 'finished', ended_at: T0 + 9_000, end_step: 16 });
        expect(await s.resolveRun('other-0001')).toMatchObject({ status: 'failed', ended_at: T0 + 1_000, end_step: 0 });
        clock.advance(60_000);
        await s.heartbeat(RUN_ID);
        expect((await s.resolveRun(RUN_ID)).status).toBe('finished');
        expect((await s.runs({ status: 'interrupted' })).map((r) => r.id)).toEqual([]);
      });
    });

    describe('windows', () => {
      it('rebuilds every window exactly: NaN, ±Infinity, null noise_scale and travel_exponent, variables, logs, noise', async () => {
        const { s, ws } = await seeded(12);
        const back = await s.windows(RUN_ID);
        expect(back).toEqual(ws);
        // Same keys in the same order, so an export of the store is byte-identical to the records written.
        expect(back.map((w) => encodeRecord({ type: 'window', window: w }))).toEqual(ws.map((w) => encodeRecord({ type: 'window', window: w })));
        // The awkward values are there (the fixture holds them) and came back as written.
        expect([back[0]!.network.update_ratio, back[6]!.logs.loss]).toEqual([Number.NaN, Number.NaN]);
        expect([back[3]!.layers.dense_Dense1!.grad_snr, back[4]!.layers.dense_Dense1!.variables!['dense_Dense1/kernel']!.grad_snr_db]).toEqual([Infinity, -Infinity]);
        expect([back[1]!.layers.dense_Dense2!.noise_scale, back[0]!.network.travel_exponent]).toEqual([null, null]);
        expect([back[5]!.noise, back[10]!.noise]).toEqual([NOISE_MEASURED, NOISE_FAILED]);
        expect(back[4]).not.toHaveProperty('noise');
        expect(back[8]!.logs).not.toHaveProperty('val_loss');
      });

      it('keeps numbers bit-exact: subnormals, the largest double, 0.1 + 0.2, integers above 2^53 that doubles hold', async () => {
        const s = await fresh();
        const run = fakeRun({ id: 'bits-0001', layers: 1 });
        await s.beginRun(run);
        const [w] = fakeWindows(run, 1, 3, false);
        w!.network.grad_mean_norm = 5e-324;
        w!.network.grad_std_norm = Number.MAX_VALUE;
        w!.network.weight_norm = 0.1 + 0.2;
        w!.logs.big = 2 ** 53 + 2;
        w!.logs.tiny = -1e-300;
        await s.append(windowRecs([w!]));
        const back = (await s.windows(run.id))[0]!;
        expect(back.network.grad_mean_norm).toBe(5e-324);
        expect(back.network.grad_std_norm).toBe(Number.MAX_VALUE);
        expect(back.network.weight_norm).toBe(0.30000000000000004);
        expect(back.logs.big).toBe(9007199254740994);
        expect(back.logs.tiny).toBe(-1e-300);
        expect(await s.series(run.id, 'grad_mean_norm')).toEqual([{ step: 8, value: 5e-324 }]);
      });

      it('leaves out the per-variable statistics with variables: false, and nothing else', async () => {
        const { s, ws } = await seeded(12);
        const lean = await s.windows(RUN_ID, { variables: false });
        expect(lean).toEqual(ws.map(withoutVariables));
        expect(lean.every((w) => Object.values(w.layers).every((l) => l.variables === undefined))).toBe(true);
        expect(await s.windows(RUN_ID, { variables: false, after: ws[9]!.step })).toEqual(ws.slice(10).map(withoutVariables));
      });

      it('reads the windows after a step, and an inclusive from/to range', async () => {
        const { s, ws } = await seeded(12);
        expect(await s.windows(RUN_ID, { after: ws[8]!.step })).toEqual(ws.slice(9));
        expect(await s.windows(RUN_ID, { after: ws[11]!.step })).toEqual([]);
        expect(await s.windows(RUN_ID, { after: -1 })).toEqual(ws);
        expect(await s.windows(RUN_ID, { from: ws[3]!.step, to: ws[7]!.step })).toEqual(ws.slice(3, 8));
        // Bounds between steps take the windows inside them.
        expect(await s.windows(RUN_ID, { from: ws[3]!.step + 0.5, to: ws[7]!.step - 0.5 })).toEqual(ws.slice(4, 7));
        // `after` and `from` together: the tighter lower bound holds.
        expect(await s.windows(RUN_ID, { after: ws[4]!.step, from: ws[2]!.step, to: ws[6]!.step })).toEqual(ws.slice(5, 7));
        expect(await s.windows(RUN_ID, { from: ws[7]!.step, to: ws[3]!.step })).toEqual([]);
      });

      it('thins to `points` evenly spread windows, the first and last kept', async () => {
        const { s, ws } = await seeded(12);
        // 12 windows to 4: positions round(k·11/3) = 0, 4, 7, 11.
        expect(await s.windows(RUN_ID, { points: 4 })).toEqual([ws[0], ws[4], ws[7], ws[11]]);
        expect(await s.windows(RUN_ID, { points: 2 })).toEqual([ws[0], ws[11]]);
        expect(await s.windows(RUN_ID, { points: 12 })).toEqual(ws);
        expect(await s.windows(RUN_ID, { points: 50 })).toEqual(ws);
        expect(await s.windows(RUN_ID, { after: ws[5]!.step, points: 2 })).toEqual([ws[6], ws[11]]);
        expect(await s.windows(RUN_ID, { from: ws[3]!.step, to: ws[7]!.step, points: 3 })).toEqual([ws[3], ws[5], ws[7]]);
        expect(await s.windows(RUN_ID, { variables: false, points: 4 })).toEqual([ws[0], ws[4], ws[7], ws[11]].map((w) => withoutVariables(w!)));
      });

      it('rejects a bad window query with TIDEMARK_ERR_OPTION_INVALID', async () => {
        const { s } = await seeded(2);
        await rejects(s.windows(RUN_ID, { variables: 'no' as never }), 'TIDEMARK_ERR_OPTION_INVALID', /variables/);
        await rejects(s.windows(RUN_ID, { points: 1 }), 'TIDEMARK_ERR_OPTION_INVALID', /points/);
        await rejects(s.windows(RUN_ID, { points: 2.5 }), 'TIDEMARK_ERR_OPTION_INVALID', /points/);
        await rejects(s.windows(RUN_ID, { after: Number.NaN }), 'TIDEMARK_ERR_OPTION_INVALID', /after/);
        await rejects(s.windows(RUN_ID, { to: 'x' as never }), 'TIDEMARK_ERR_OPTION_INVALID', /to/);
      });
    });

    describe('writing once', () => {
      it('stores a resent window, marker or warning once', async () => {
        const { s, run, ws } = await seeded(12);
        const warning: SinkRecord = { type: 'warning', run: RUN_ID, code: 'TIDEMARK_ERR_NONFINITE', message: 'NaN', step: 24, time: T0 };
        await s.append([...markerRecs(fakeMarkers(run)), warning]);
        // A sink that lost its acknowledgement resends an overlapping batch.
        await s.append([...windowRecs(ws.slice(5)), ...markerRecs(fakeMarkers(run)), warning, ...windowRecs(ws.slice(0, 2))]);
        expect(await s.windows(RUN_ID)).toEqual(ws);
        expect(await s.markers(RUN_ID)).toHaveLength(3);
        expect(await s.warnings(RUN_ID)).toHaveLength(1);
        expect(await s.series(RUN_ID, 'grad_snr')).toHaveLength(12);
        expect(await s.series(RUN_ID, 'snr_floor')).toHaveLength(12);
        expect((await s.runs())[0]).toMatchObject({ windows: 12, last_step: 96 });
      });

      it('treats markers as the same by (run, layer, kind, step, detected_step), network ones too', async () => {
        const { s } = await seeded(1);
        const m: Marker = { run: RUN_ID, layer: null, kind: 'note', step: 5, detected_step: 6, confidence: 1, details: { text: 'a' } };
        await s.append(markerRecs([m, { ...m, details: { text: 'resent' } }, { ...m, detected_step: 7 }, { ...m, layer: 'dense_Dense1' }, { ...m, kind: 'advice' }]));
        const back = (await s.markers(RUN_ID)).map((x) => [x.layer, x.kind, x.detected_step, x.details]);
        expect(back).toHaveLength(4);
        expect(back).toContainEqual([null, 'note', 6, { text: 'a' }]);
        expect(back).toContainEqual(['dense_Dense1', 'note', 6, { text: 'a' }]);
        expect(back).toContainEqual([null, 'note', 7, { text: 'a' }]);
        expect(back).toContainEqual([null, 'advice', 6, { text: 'a' }]);
      });

      it('stores a numbered batch (run, seq) once: a resend is a duplicate and adds nothing', async () => {
        const s = await fresh();
        const run = fakeRun({ id: 'remote-0001' });
        const ws = fakeWindows(run, 4);
        const first: SinkRecord[] = [{ type: 'run', run }, ...windowRecs(ws.slice(0, 2))];
        expect(await s.appendBatch(run.id, 0, first)).toEqual({ duplicate: false });
        expect(await s.appendBatch(run.id, 0, first)).toEqual({ duplicate: true });
        expect(await s.appendBatch(run.id, 1, windowRecs(ws.slice(2)))).toEqual({ duplicate: false });
        // Another content under a stored seq is still a duplicate: the seq decides.
        const late: Marker = { ...fakeMarkers(run)[0]! };
        expect(await s.appendBatch(run.id, 1, markerRecs([late]))).toEqual({ duplicate: true });
        expect(await s.windows(run.id)).toEqual(ws);
        expect(await s.markers(run.id)).toEqual([]);
        expect((await s.runs())[0]).toMatchObject({ id: run.id, windows: 4, last_step: 32 });
        // The same seq of another run is another batch.
        const other = fakeRun({ id: 'remote-0002' });
        expect(await s.appendBatch(other.id, 0, [{ type: 'run', run: other }])).toEqual({ duplicate: false });
      });

      it("refuses a batch holding a record of another run, a bad seq, or a run the store doesn't have", async () => {
        const s = await fresh();
        const run = fakeRun({ id: 'remote-0003' });
        const other = fakeRun({ id: 'remote-0004' });
        await rejects(s.appendBatch(run.id, 0, [{ type: 'run', run }, { type: 'run', run: other }]), 'TIDEMARK_ERR_RECORD_INVALID', /record 1 of batch 0 belongs to run "remote-0004", not to the batch's run "remote-0003"/);
        await rejects(s.appendBatch(run.id, -1, []), 'TIDEMARK_ERR_RECORD_INVALID', /seq/);
        await rejects(s.appendBatch(run.id, 1.5, []), 'TIDEMARK_ERR_RECORD_INVALID', /seq/);
        await rejects(s.appendBatch(run.id, 3, windowRecs(fakeWindows(run, 1))), 'TIDEMARK_ERR_RUN_NOT_FOUND', /remote-0003/);
        expect(await s.runs()).toEqual([]);
        // None of those was recorded as stored: seq 0 and 3 are still new.
        expect(await s.appendBatch(run.id, 0, [{ type: 'run', run }])).toEqual({ duplicate: false });
        expect(await s.appendBatch(run.id, 3, windowRecs(fakeWindows(run, 1)))).toEqual({ duplicate: false });
        expect(await s.windows(run.id)).toHaveLength(1);
      });

      it('keeps nothing of a call that fails, so a retry stores everything once', async () => {
        const { s, run, ws } = await seeded(4);
        const more = fakeWindows(run, 7).slice(4);
        // A metric first seen in the failing call: its series must not survive the failure.
        more[0]!.logs.lr = 0.01;
        more[2]!.logs.lr = 0.005;
        const bad: WindowRecord = { ...more[1]!, network: { ...more[1]!.network, grad_snr: '3' as never } };
        await rejects(s.append(windowRecs([more[0]!, bad, more[2]!])), 'TIDEMARK_ERR_RECORD_INVALID', /metric "grad_snr" of network .* received "3"/);
        const stranger = markerRecs([{ ...fakeMarkers(run)[0]!, run: 'no-such-run' }]);
        await rejects(s.append([...windowRecs(more), ...stranger]), 'TIDEMARK_ERR_RUN_NOT_FOUND', /no-such-run/);
        await rejects(s.appendBatch(RUN_ID, 7, windowRecs([more[0]!, bad])), 'TIDEMARK_ERR_RECORD_INVALID', /grad_snr/);
        expect(await s.windows(RUN_ID)).toEqual(ws);
        expect((await s.seriesKeys(RUN_ID)).some((k) => k.metric === 'lr')).toBe(false);
        expect(await s.series(RUN_ID, 'lr')).toEqual([]);
        expect(await s.series(RUN_ID, 'grad_snr')).toHaveLength(4);
        expect((await s.runs())[0]).toMatchObject({ windows: 4, last_step: 32 });
        expect(await s.appendBatch(RUN_ID, 7, windowRecs(more))).toEqual({ duplicate: false });
        expect(await s.windows(RUN_ID)).toEqual([...ws, ...more]);
        expect(await s.series(RUN_ID, 'lr')).toEqual([{ step: 40, value: 0.01 }, { step: 56, value: 0.005 }]);
      });

      it('refuses records for a run it does not have with TIDEMARK_ERR_RUN_NOT_FOUND', async () => {
        const { s } = await seeded(1);
        const ghost = fakeRun({ id: 'ghost-0001' });
        await rejects(s.append(windowRecs(fakeWindows(ghost, 1))), 'TIDEMARK_ERR_RUN_NOT_FOUND', /"ghost-0001".*send its run record/);
        await rejects(s.append(markerRecs(fakeMarkers(ghost).slice(0, 1))), 'TIDEMARK_ERR_RUN_NOT_FOUND', /"ghost-0001"/);
        await rejects(s.append([{ type: 'warning', run: ghost.id, code: 'X', message: 'm', step: null, time: 1 }]), 'TIDEMARK_ERR_RUN_NOT_FOUND', /"ghost-0001"/);
        await rejects(s.append([{ type: 'end', run: ghost.id, status: 'finished', step: 1, time: 1 }]), 'TIDEMARK_ERR_RUN_NOT_FOUND', /"ghost-0001"/);
        expect((await s.runs()).map((r) => r.id)).toEqual([RUN_ID]);
      });

      it('answers reads of a run it does not have with TIDEMARK_ERR_RUN_NOT_FOUND', async () => {
        const { s } = await seeded(1);
        const reads = [() => s.windows('nope'), () => s.markers('nope'), () => s.markersSince('nope', 0), () => s.warnings('nope'), () => s.seriesKeys('nope'), () => s.series('nope', 'grad_snr')];
        for (const read of reads) await rejects(read(), 'TIDEMARK_ERR_RUN_NOT_FOUND', /No run has the id "nope"/);
      });

      it('refuses malformed records and a window whose step another window has, with TIDEMARK_ERR_RECORD_INVALID', async () => {
        const { s, run, ws } = await seeded(2);
        const [w] = fakeWindows(run, 3).slice(2);
        await rejects(s.append(windowRecs([{ ...w!, index: 99, step: ws[1]!.step }])), 'TIDEMARK_ERR_RECORD_INVALID', /step 16, which another stored window/);
        await rejects(s.append([{ type: 'nope' } as never]), 'TIDEMARK_ERR_RECORD_INVALID', /type "nope"/);
        await rejects(s.append([{ type: 'end', run: RUN_ID, status: 'done' as never, step: 1, time: 1 }]), 'TIDEMARK_ERR_RECORD_INVALID', /end.status/);
        await rejects(s.beginRun({ ...fakeRun({ id: 'bad-tags' }), tags: { seed: 1 } as never }), 'TIDEMARK_ERR_RECORD_INVALID', /run.tags/);
        expect(await s.windows(RUN_ID)).toEqual(ws);
        expect((await s.runs()).map((r) => r.id)).toEqual([RUN_ID]);
      });
    });

    describe('series', () => {
      it('reads network, layer and variable series over an inclusive step range; null values are no points', async () => {
        const { s, ws } = await seeded(12);
        expect(await s.series(RUN_ID, 'grad_snr', { from: 16, to: 32 })).toEqual([1, 2, 3].map((i) => ({ step: ws[i]!.step, value: ws[i]!.network.grad_snr })));
        expect(await s.series(RUN_ID, 'grad_snr', { layer: null, to: 40 })).toEqual(ws.slice(0, 5).map((w) => ({ step: w.step, value: w.network.grad_snr })));
        expect(await s.series(RUN_ID, 'weight_norm', { layer: 'dense_Dense2' })).toEqual(ws.map((w) => ({ step: w.step, value: w.layers.dense_Dense2!.weight_norm })));
        expect(await s.series(RUN_ID, 'grad_snr', { layer: 'dense_Dense1' })).toContainEqual({ step: 32, value: Infinity });
        expect(await s.series(RUN_ID, 'grad_mean_norm', { layer: 'dense_Dense3/bias', to: 24 })).toEqual(
          ws.slice(0, 3).map((w) => ({ step: w.step, value: w.layers.dense_Dense3!.variables!['dense_Dense3/bias']!.grad_mean_norm })),
        );
        expect((await s.series(RUN_ID, 'noise_scale')).map((p) => p.step)).toEqual(ws.filter((w) => w.network.noise_scale !== null).map((w) => w.step));
        expect((await s.series(RUN_ID, 'travel_exponent', { layer: 'dense_Dense1' })).map((p) => p.step)).toEqual(ws.slice(3).map((w) => w.step));
        expect(await s.series(RUN_ID, 'update_ratio', { to: 8 })).toEqual([{ step: 8, value: Number.NaN }]);
        expect(await s.series(RUN_ID, 'grad_snr_db', { from: 40, to: 40 })).toEqual([{ step: 40, value: -Infinity }]);
      });

      it('reads run-level series: the logs and the window fields snr_floor, epoch and batch_size; unknown ones are empty', async () => {
        const { s, ws } = await seeded(12);
        expect(await s.series(RUN_ID, 'loss')).toEqual(ws.map((w) => ({ step: w.step, value: w.logs.loss })));
        expect(await s.series(RUN_ID, 'loss', { from: 56, to: 56 })).toEqual([{ step: 56, value: Number.NaN }]);
        expect(await s.series(RUN_ID, 'val_loss')).toEqual([{ step: 80, value: ws[9]!.logs.val_loss }]);
        expect(await s.series(RUN_ID, 'snr_floor')).toEqual(ws.map((w) => ({ step: w.step, value: w.snr_floor })));
        expect(await s.series(RUN_ID, 'epoch', { from: 72, to: 88 })).toEqual([{ step: 72, value: 0 }, { step: 80, value: 0 }, { step: 88, value: 1 }]);
        expect(await s.series(RUN_ID, 'batch_size', { to: 16 })).toEqual([{ step: 8, value: 32 }, { step: 16, value: 32 }]);
        expect(await s.series(RUN_ID, 'no_such_metric')).toEqual([]);
        expect(await s.series(RUN_ID, 'grad_snr', { layer: 'no_such_layer' })).toEqual([]);
        expect(await s.series(RUN_ID, 'grad_snr', { from: 1000 })).toEqual([]);
      });

      it('downsamples with LTTB to exactly `points`, the first and last kept, as lttb() picks from the whole series', async () => {
        const s = await fresh();
        const run = fakeRun({ id: 'long-0001', layers: 1 });
        await s.beginRun(run);
        const ws = fakeWindows(run, 600, 9, false);
        await s.append(windowRecs(ws));
        const full = await s.series(run.id, 'grad_snr');
        expect(full).toEqual(ws.map((w) => ({ step: w.step, value: w.network.grad_snr })));
        const down = await s.series(run.id, 'grad_snr', { points: 50 });
        expect(down).toHaveLength(50);
        expect(down[0]).toEqual(full[0]);
        expect(down[49]).toEqual(full[599]);
        expect(down).toEqual(lttb(full.map((p) => p.step), full.map((p) => p.value), 50).map((i) => full[i]));
        const ranged = full.filter((p) => p.step >= 400 && p.step <= 2400);
        expect(await s.series(run.id, 'grad_snr', { from: 400, to: 2400, points: 20 })).toEqual(
          lttb(ranged.map((p) => p.step), ranged.map((p) => p.value), 20).map((i) => ranged[i]),
        );
        // A range with no more than `points` points comes back whole.
        expect(await s.series(run.id, 'grad_snr', { from: 80, to: 800, points: 200 })).toEqual(full.slice(9, 100));
        const logs = await s.series(run.id, 'loss');
        expect(await s.series(run.id, 'loss', { points: 30 })).toEqual(lttb(logs.map((p) => p.step), logs.map((p) => p.value), 30).map((i) => logs[i]));
      });

      it('reads only the newest `last` points, in step order', async () => {
        const { s, ws } = await seeded(12);
        const full = await s.series(RUN_ID, 'grad_snr');
        expect(await s.series(RUN_ID, 'grad_snr', { last: 3 })).toEqual(full.slice(-3));
        expect(await s.series(RUN_ID, 'grad_snr', { to: 40, last: 2 })).toEqual(full.slice(3, 5));
        expect(await s.series(RUN_ID, 'grad_snr', { last: 500 })).toEqual(full);
        expect(await s.series(RUN_ID, 'weight_norm', { layer: 'dense_Dense1/kernel', last: 1 })).toEqual([{ step: 96, value: ws[11]!.layers.dense_Dense1!.variables!['dense_Dense1/kernel']!.weight_norm }]);
        expect(await s.series(RUN_ID, 'batch_size', { last: 1 })).toEqual([{ step: 96, value: 32 }]);
        expect(await s.series(RUN_ID, 'epoch', { last: 3 })).toEqual([{ step: 80, value: 0 }, { step: 88, value: 1 }, { step: 96, value: 1 }]);
      });

      it('rejects a bad series query', async () => {
        const { s } = await seeded(2);
        await rejects(s.series(RUN_ID, 'grad_snr', { points: 1 }), 'TIDEMARK_ERR_OPTION_INVALID', /'points' must be an integer of at least 2; received 1/);
        await rejects(s.series(RUN_ID, 'grad_snr', { last: 0 }), 'TIDEMARK_ERR_OPTION_INVALID', /'last'/);
        await rejects(s.series(RUN_ID, 'grad_snr', { from: Number.NaN }), 'TIDEMARK_ERR_OPTION_INVALID', /'from'/);
        await rejects(s.series(RUN_ID, 'grad_snr', { layer: 3 as never }), 'TIDEMARK_ERR_OPTION_INVALID', /'layer'/);
        await rejects(s.series(RUN_ID, 'grad_snr', { point: 5 } as never), 'TIDEMARK_ERR_OPTION_UNKNOWN', /Unknown option 'point' of series. Did you mean 'points'\?/);
      });

      it('lists the series keys of a run by scope, variables under their own names', async () => {
        const { s, ws } = await seeded(10);
        const keys = await s.seriesKeys(RUN_ID);
        expect(new Set(keys.map(keyOf))).toEqual(expectedKeys(ws));
        expect(keys).toHaveLength(expectedKeys(ws).size);
        expect(keys.filter((k) => k.scope === 'network')).toHaveLength(12);
        expect(keys.filter((k) => k.scope === 'variable' && k.layer === 'dense_Dense2/bias')).toHaveLength(11);
        expect(keys.filter((k) => k.scope === 'run').map((k) => k.metric).sort()).toEqual(['acc', 'batch_size', 'epoch', 'loss', 'snr_floor', 'val_loss']);
        const empty = fakeRun({ id: 'empty-0001' });
        await s.beginRun(empty);
        expect(await s.seriesKeys(empty.id)).toEqual([]);
      });
    });

    describe('markers and warnings', () => {
      it('reads markers in step order, details and non-finite values kept', async () => {
        const { s, run } = await seeded(4);
        const ms = fakeMarkers(run);
        await s.append(markerRecs(ms));
        const back = await s.markers(RUN_ID);
        expect(back).toEqual([ms[0], ms[2], ms[1]]);
        expect(back[2]!.details.ratio).toBe(Infinity);
      });

      it('reads the markers stored since a cursor, in the order stored, with a cursor that advances', async () => {
        const { s, run } = await seeded(4);
        expect(await s.markersSince(RUN_ID, 0)).toEqual({ markers: [], cursor: 0 });
        const ms = fakeMarkers(run);
        await s.append(markerRecs(ms));
        const first = await s.markersSince(RUN_ID, 0);
        expect(first.markers).toEqual(ms);
        expect(first.cursor).toBeGreaterThan(0);
        expect(await s.markersSince(RUN_ID, first.cursor)).toEqual({ markers: [], cursor: first.cursor });
        const late: Marker = { run: RUN_ID, layer: null, kind: 'advice', step: 8, detected_step: 32, confidence: 1, details: { verdict: 'may-stop' } };
        await s.append(markerRecs([late]));
        // A marker stored again is the same marker: it does not come back.
        await s.append(markerRecs([late, ms[1]!]));
        const next = await s.markersSince(RUN_ID, first.cursor);
        expect(next.markers).toEqual([late]);
        expect(next.cursor).toBeGreaterThan(first.cursor);
        expect(await s.markersSince(RUN_ID, next.cursor)).toEqual({ markers: [], cursor: next.cursor });
        expect(new Set((await s.markers(RUN_ID)).map(markerKey))).toEqual(new Set([...ms, late].map(markerKey)));
        await rejects(s.markersSince(RUN_ID, -1), 'TIDEMARK_ERR_OPTION_INVALID', /cursor/);
      });

      it('reads warnings in time order, each once', async () => {
        const { s } = await seeded(1);
        const w = (code: string, time: number, step: number | null, message = `${code} happened`): SinkRecord => ({ type: 'warning', run: RUN_ID, code, message, step, time });
        await s.append([w('TIDEMARK_ERR_PROBE', T0 + 300, 24), w('TIDEMARK_ERR_NONFINITE', T0 + 100, null), w('TIDEMARK_ERR_NOISE', T0 + 200, 16)]);
        await s.append([w('TIDEMARK_ERR_NONFINITE', T0 + 100, null), w('TIDEMARK_ERR_NONFINITE', T0 + 100, null, 'another message')]);
        expect(await s.warnings(RUN_ID)).toEqual([
          { run: RUN_ID, code: 'TIDEMARK_ERR_NONFINITE', message: 'TIDEMARK_ERR_NONFINITE happened', step: null, time: T0 + 100 },
          { run: RUN_ID, code: 'TIDEMARK_ERR_NONFINITE', message: 'another message', step: null, time: T0 + 100 },
          { run: RUN_ID, code: 'TIDEMARK_ERR_NOISE', message: 'TIDEMARK_ERR_NOISE happened', step: 16, time: T0 + 200 },
          { run: RUN_ID, code: 'TIDEMARK_ERR_PROBE', message: 'TIDEMARK_ERR_PROBE happened', step: 24, time: T0 + 300 },
        ]);
      });
    });

    describe('deleting', () => {
      it('deletes a run and everything of it, leaving other runs whole; the run can be written again from scratch', async () => {
        const { s, run, ws } = await seeded(5);
        const other = fakeRun({ id: 'other-0001', name: 'other' });
        await s.beginRun(other);
        const ows = fakeWindows(other, 4, 2);
        const warn = (r: string): SinkRecord => ({ type: 'warning', run: r, code: 'TIDEMARK_ERR_NONFINITE', message: 'NaN', step: 24, time: 1 });
        await s.append([...windowRecs(ows), ...markerRecs(fakeMarkers(run)), ...markerRecs(fakeMarkers(other)), warn(RUN_ID), warn(other.id)]);
        expect(await s.deleteRun(RUN_ID)).toBe(true);
        expect(await s.deleteRun(RUN_ID)).toBe(false);
        expect((await s.runs()).map((r) => r.id)).toEqual([other.id]);
        await rejects(s.resolveRun(RUN_ID), 'TIDEMARK_ERR_RUN_NOT_FOUND');
        await rejects(s.windows(RUN_ID), 'TIDEMARK_ERR_RUN_NOT_FOUND');
        await rejects(s.series(RUN_ID, 'grad_snr'), 'TIDEMARK_ERR_RUN_NOT_FOUND');
        await rejects(s.markers(RUN_ID), 'TIDEMARK_ERR_RUN_NOT_FOUND');
        expect(await s.windows(other.id)).toEqual(ows);
        expect(await s.markers(other.id)).toHaveLength(3);
        expect(await s.warnings(other.id)).toHaveLength(1);
        expect(await s.series(other.id, 'grad_snr')).toHaveLength(4);
        // Written again, the run holds only what is new: nothing of the deleted one came back.
        await s.beginRun(run);
        expect(await s.seriesKeys(RUN_ID)).toEqual([]);
        await s.append(windowRecs(ws.slice(0, 2)));
        expect(await s.windows(RUN_ID)).toEqual(ws.slice(0, 2));
        expect(await s.series(RUN_ID, 'grad_snr')).toHaveLength(2);
        expect(await s.markers(RUN_ID)).toEqual([]);
        expect(await s.warnings(RUN_ID)).toEqual([]);
        expect((await s.resolveRun(RUN_ID)).windows).toBe(2);
      });

      it('prunes runs created before a time, never a live one, and returns their ids', async () => {
        const clock = fakeClock();
        const s = await fresh({ now: clock.now });
        await s.beginRun(fakeRun({ id: 'old-finished', started_at: 1000 }));
        await s.append([{ type: 'end', run: 'old-finished', status: 'finished', step: 1, time: 2000 }]);
        await s.beginRun(fakeRun({ id: 'old-live', started_at: 1500 }));
        await s.beginRun(fakeRun({ id: 'new', started_at: 5000 }));
        expect(await s.prune(3000)).toEqual(['old-finished']);
        await rejects(s.resolveRun('old-finished'), 'TIDEMARK_ERR_RUN_NOT_FOUND');
        expect(await s.prune(3000)).toEqual([]);
        clock.advance(60_000);
        expect(await s.prune(3000)).toEqual(['old-live']);
        expect((await s.runs()).map((r) => r.id)).toEqual(['new']);
        await rejects(s.prune(Number.NaN), 'TIDEMARK_ERR_OPTION_INVALID', /'before' must be a time/);
      });
    });

    describe('read-only and closed stores', () => {
      it('opened read-only, reads what a writer stores and refuses every write with TIDEMARK_ERR_STORE_READONLY', async () => {
        const place = backend.place();
        const { s, run, ws } = await seeded(3, {}, place);
        const ro = await openAt(place, { readonly: true });
        expect([s.backend, s.readonly, ro.backend, ro.readonly]).toEqual([backend.name, false, backend.name, true]);
        expect(await ro.windows(RUN_ID)).toEqual(ws);
        const more = fakeWindows(run, 4).slice(3);
        await s.append(windowRecs(more));
        expect(await ro.windows(RUN_ID)).toEqual([...ws, ...more]);
        const writes = { beginRun: () => ro.beginRun(fakeRun({ id: 'ro-0001' })), append: () => ro.append([]), appendBatch: () => ro.appendBatch(RUN_ID, 0, []), heartbeat: () => ro.heartbeat(RUN_ID), deleteRun: () => ro.deleteRun(RUN_ID), prune: () => ro.prune(Date.now()) };
        for (const [what, write] of Object.entries(writes)) await rejects(write(), 'TIDEMARK_ERR_STORE_READONLY', new RegExp(`^${what}: .*opened read-only`));
        expect((await s.runs()).map((r) => r.id)).toEqual([RUN_ID]);
        expect(await s.windows(RUN_ID)).toHaveLength(4);
      });

      it('rejects every call after close() with TIDEMARK_ERR_STORE_CLOSED; closing again is harmless', async () => {
        const { s, run } = await seeded(1);
        await s.close();
        await s.close();
        const calls: (() => Promise<unknown>)[] = [
          () => s.beginRun(run), () => s.append([]), () => s.appendBatch(RUN_ID, 0, []), () => s.heartbeat(RUN_ID),
          () => s.deleteRun(RUN_ID), () => s.prune(0), () => s.runs(), () => s.resolveRun(RUN_ID), () => s.seriesKeys(RUN_ID),
          () => s.series(RUN_ID, 'grad_snr'), () => s.markers(RUN_ID), () => s.markersSince(RUN_ID, 0), () => s.warnings(RUN_ID),
          () => s.windows(RUN_ID),
        ];
        for (const call of calls) await rejects(call(), 'TIDEMARK_ERR_STORE_CLOSED', /was closed/);
      });
    });
  });
}
