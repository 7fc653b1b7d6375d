/**
 * The group report's alignment by epoch, its noise-scale and weight-travel bands, and what each run reached
 * (advice, best validation value, a training-loss target), read back from a store where these are known
 * because the test wrote them. Medians are checked against simple-statistics on the same numbers.
 */
import { mkdtempSync, rmSync } from 'node:fs';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import { median as ssMedian } from 'simple-statistics';
import { afterAll, describe, expect, it } from 'vitest';
import { valuesInLogBins, valuesOnLogSteps } from '../../src/analysis/group-bands.js';
import { renderGroup, renderSweep } from '../../src/cli/group.js';
import type { Marker, SinkRecord, WindowRecord } from '../../src/protocol/records.js';
import { asAsyncStore, type AsyncStore } from '../../src/storage/async-store.js';
import { groupReport, matchLayers, sweepOf } from '../../src/storage/group-report.js';
import { openStore } from '../../src/storage/sqlite-store.js';
import { fakeRun, fakeWindows } from '../helpers/window-records.js';

// fakeWindows: 8 minibatches a window, 10 windows to an epoch, so 80 minibatches per epoch once known.
const PER_EPOCH = 80;
const NETWORK_STEPS = [96, 120, 80, 144];
const LOSS_TARGET = 0.2;

const dir = mkdtempSync(join(tmpdir(), 'tidemark-group-report-'));
const db = join(dir, 'g.db');
const written: WindowRecord[][] = [];

{
  const store = openStore(db);
  for (let k = 0; k < 5; k++) {
    const run = fakeRun({ id: `run-${k}`, group: 'seeds', tags: { width: String(2 ** k) }, started_at: 1_700_000_000_000 + k });
    store.beginRun(run);
    // Run 4 stops inside its first epoch: its epoch length is never known.
    const ws = fakeWindows(run, k === 4 ? 6 : 20, 30 + k, false);
    // Runs 0 and 1 log a validation accuracy too (at the epoch ends), which their best value must then be.
    if (k < 2) for (const w of ws) if (w.logs.val_loss !== undefined) w.logs.val_acc = 0.5 + 0.1 * k + w.step / 1000;
    written.push(ws);
    const markers: Marker[] = [];
    if (k < 4) markers.push({ run: run.id, layer: null, kind: 'diffusion-start', step: NETWORK_STEPS[k]!, detected_step: NETWORK_STEPS[k]! + 8, confidence: 0.8, details: {} });
    if (k === 1) {
      markers.push({ run: run.id, layer: null, kind: 'advice', step: 120, detected_step: 120, confidence: 0.5, details: { verdict: 'may-stop' } });
      markers.push({ run: run.id, layer: null, kind: 'advice', step: 152, detected_step: 152, confidence: 0.6, details: { verdict: 'stop' } });
    }
    store.append([...ws.map((window): SinkRecord => ({ type: 'window', window })), ...markers.map((marker): SinkRecord => ({ type: 'marker', marker }))]);
  }
  store.close();
}

afterAll(() => rmSync(dir, { recursive: true, force: true }));

async function withReader<T>(f: (s: AsyncStore) => Promise<T>): Promise<T> {
  const s = asAsyncStore(openStore(db, { readonly: true }));
  try {
    return await f(s);
  } finally {
    await s.close();
  }
}

describe('groupReport', () => {
  it('aligns by epoch: steps ÷ minibatches per epoch, a run whose epoch length is unknown left out and named', async () => {
    const r = (await withReader((s) => groupReport(s, 'seeds', { align: 'epoch' })))!;
    expect(r.align).toBe('epoch');
    expect(r.unaligned).toEqual(['run-4']);
    const network = r.layers.find((l) => l.position === null)!;
    expect(network.transitions).toEqual([...NETWORK_STEPS.map((s) => s / PER_EPOCH), null]);
    expect(network.transition!.median).toBeCloseTo(ssMedian(NETWORK_STEPS.map((s) => s / PER_EPOCH)), 12);
    // From the first step (1/80 epoch) to the last of the aligned runs (160 steps = 2 epochs).
    expect(r.grid[0]).toBeCloseTo(1 / PER_EPOCH, 12);
    expect(r.grid[r.grid.length - 1]).toBe(2);
    expect(renderGroup(r)).toContain('aligned by epoch');
    expect(renderGroup(r)).toContain('left out: its epoch length is unknown');
  });

  it('gives bands of the weight travel (runs interpolated on log step) and the noise scale (runs binned on log step)', async () => {
    for (const align of ['step', 'epoch'] as const) {
      const r = (await withReader((s) => groupReport(s, 'seeds', { align })))!;
      const runs = align === 'epoch' ? 4 : 5;
      const scale = align === 'epoch' ? PER_EPOCH : 1;
      const layer0 = r.layers.find((l) => l.position === 0)!;
      for (const [band, value, place] of [
        [layer0.weightTravel, (w: WindowRecord) => w.layers[r.layers[1]!.layer]!.weight_travel, valuesOnLogSteps],
        [layer0.noiseScale, (w: WindowRecord) => w.layers[r.layers[1]!.layer]!.noise_scale, valuesInLogBins],
      ] as const) {
        // Each run's own windows, as written, put on the grid by hand from the records (not read back).
        const onGrid = written.slice(0, runs).map((ws) =>
          place(ws.filter((w) => value(w) !== null).map((w) => ({ step: w.step / scale, value: value(w)! })), r.grid),
        );
        let checked = 0;
        r.grid.forEach((_, g) => {
          const vals = onGrid.map((v) => v[g]!).filter(Number.isFinite);
          expect(band[g]!.n).toBe(vals.length);
          if (vals.length > 0) {
            expect(band[g]!.median).toBeCloseTo(ssMedian(vals), 9);
            checked++;
          }
        });
        expect(checked).toBeGreaterThan(3);
      }
    }
  });

  it('says what each run reached: advice, its best validation value (accuracy when logged), a loss target', async () => {
    const r = (await withReader((s) => groupReport(s, 'seeds', { lossTarget: LOSS_TARGET })))!;
    expect(r.outcomes.map((o) => o.stop)).toEqual([null, 152, null, null, null]);
    expect(r.stops).toEqual([null, 152, null, null, null]);
    expect(r.outcomes[1]).toMatchObject({ mayStop: 120, advice: { verdict: 'stop', at: 152 } });
    expect(r.outcomes[0]!.advice).toBeNull();
    // Runs 0, 1: the highest val_acc (the last epoch end, step 160); runs 2, 3: the lowest val_loss.
    expect(r.outcomes[0]!.bestValidation).toEqual({ metric: 'val_acc', value: 0.5 + 160 / 1000, at: 160 });
    expect(r.outcomes[1]!.bestValidation).toEqual({ metric: 'val_acc', value: 0.6 + 160 / 1000, at: 160 });
    const lowest = (ws: WindowRecord[]) => ws.filter((w) => w.logs.val_loss !== undefined).sort((a, b) => a.logs.val_loss! - b.logs.val_loss!)[0]!;
    expect(r.outcomes[2]!.bestValidation).toEqual({ metric: 'val_loss', value: lowest(written[2]!).logs.val_loss, at: lowest(written[2]!).step });
    // Run 4 ended before its first epoch: no validation value at all.
    expect(r.outcomes[4]!.bestValidation).toBeNull();
    r.outcomes.forEach((o, k) => {
      const first = written[k]!.find((w) => w.logs.loss! <= LOSS_TARGET);
      expect(o.lossTarget).toBe(first?.step ?? null);
    });
    expect(r.outcomes.some((o) => o.lossTarget !== null)).toBe(true);
    const text = renderGroup(r);
    expect(text).toContain('advice stop at step 152');
    expect(text).toContain('best val_acc');
    expect(text).toContain('Noise scale (examples) across runs');
    expect(text).toContain('Weight travel');
  });

  it('sweeps any outcome: loss target in epochs, best validation value, each run without it listed', async () => {
    const r = (await withReader((s) => groupReport(s, 'seeds', { align: 'epoch', lossTarget: LOSS_TARGET })))!;
    const w = sweepOf(r, 'width', 'loss-target');
    expect(w.units).toBe('epochs');
    expect(w.left).toContainEqual({ run: 'run-4', why: 'its epoch length is unknown' });
    for (const p of w.points) {
      const k = Number(p.run.slice(4));
      expect(p.x).toBe(2 ** k);
      expect(p.y).toBeCloseTo(written[k]!.find((x) => x.logs.loss! <= LOSS_TARGET)!.step / PER_EPOCH, 12);
    }
    const best = sweepOf(r, 'width', 'best-validation');
    expect(best.units).toBe('val_acc / val_loss');
    expect(best.points.map((p) => p.run)).toEqual(['run-0', 'run-1', 'run-2', 'run-3']);
    expect(best.fit).not.toBeNull();
    expect(renderSweep(best)).toContain('best validation value (val_acc / val_loss)');
    expect(renderSweep(w)).toContain('epochs to the training-loss target');
  });

  it('compares runs of different depths only on the layers all of them name, and lists the rest', async () => {
    // A depth sweep: 2, 3 and 4 layers named dense_Dense1…k. Position 2 is the last layer of the shallowest run
    // but a hidden one of the others, so only dense_Dense1 and dense_Dense2 are compared.
    const path = join(dir, 'depths.db');
    const steps = [40, 56, 72];
    const store = openStore(path);
    for (const [k, depth] of [2, 3, 4].entries()) {
      const run = fakeRun({ id: `d${depth}`, group: 'depths', layers: depth, tags: { depth: String(depth) }, started_at: 1_700_000_000_000 + k });
      store.beginRun(run);
      const marker: Marker = { run: run.id, layer: 'dense_Dense2', kind: 'diffusion-start', step: steps[k]!, detected_step: steps[k]! + 8, confidence: 0.7, details: {} };
      store.append([...fakeWindows(run, 12, 50 + k).map((window): SinkRecord => ({ type: 'window', window })), { type: 'marker', marker }]);
    }
    store.close();
    const reader = asAsyncStore(openStore(path, { readonly: true }));
    try {
      const r = (await groupReport(reader, 'depths'))!;
      expect(r.byPosition).toBe(false);
      expect(r.layers.map((l) => l.layer)).toEqual(['(network)', 'dense_Dense1', 'dense_Dense2']);
      expect(r.leftOut).toEqual(['dense_Dense3', 'dense_Dense4']);
      expect(r.layers[2]!.transitions).toEqual(steps);
      expect(renderGroup(r)).toContain('dense_Dense3, dense_Dense4 (not in every run) left out');
    } finally {
      await reader.close();
    }
  });
});

describe('matchLayers', () => {
  it('matches equal depths by position, other depths by shared name', () => {
    // tfjs numbers automatic names per process: the same network trained twice in one process.
    expect(matchLayers([['dense_Dense1', 'dense_Dense2'], ['dense_Dense3', 'dense_Dense4']])).toEqual({
      columns: [['dense_Dense1', 'dense_Dense3'], ['dense_Dense2', 'dense_Dense4']],
      byPosition: true,
      leftOut: [],
    });
    expect(matchLayers([['hidden1_16', 'output_4'], ['hidden1_16', 'hidden2_16', 'output_4']])).toEqual({
      columns: [['hidden1_16', 'hidden1_16'], ['output_4', 'output_4']],
      byPosition: false,
      leftOut: ['hidden2_16'],
    });
    expect(matchLayers([['a'], ['b', 'c']])).toEqual({ columns: [], byPosition: false, leftOut: ['a', 'b', 'c'] });
  });
});
