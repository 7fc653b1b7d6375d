import { mkdtempSync, readFileSync, rmSync, writeFileSync } from 'node:fs';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import { afterAll, beforeAll, describe, expect, it } from 'vitest';
import { decodeRecord, monitor, type MonitorWarning, type Sink, type SinkRecord } from '../../src/index.js';
import { blobTensors, denseModel, tf, useCpu } from '../helpers/tf.js';

beforeAll(useCpu);

const dir = mkdtempSync(join(tmpdir(), 'tidemark-monitor-'));
afterAll(() => rmSync(dir, { recursive: true, force: true }));

function collect() {
  const warnings: MonitorWarning[] = [];
  return { warnings, onWarning: (w: MonitorWarning) => void warnings.push(w) };
}

describe('monitor() argument checks', () => {
  const model = denseModel({ inputs: 3, hidden: [4], outputs: 2 });

  it('rejects a misspelt option with a hint', async () => {
    const err = await monitor(model, { windw: 'auto' } as never).catch((e: unknown) => e);
    expect(err).toBeInstanceOf(TypeError);
    expect(err).toMatchObject({ code: 'TIDEMARK_ERR_OPTION_UNKNOWN' });
    expect((err as Error).message).toMatch(/Unknown option 'windw'\. Did you mean 'window'\?/);
  });

  it('rejects a window of one step as a RangeError', async () => {
    const err = await monitor(model, { window: 1 }).catch((e: unknown) => e);
    expect(err).toBeInstanceOf(RangeError);
    expect(err).toMatchObject({ code: 'TIDEMARK_ERR_OPTION_INVALID' });
    expect((err as Error).message).toContain("Option 'window'");
    expect((err as Error).message).toContain('received 1');
  });

  it('rejects values of the wrong type, naming the option and the value', async () => {
    const err = await monitor(model, { store: 42 } as never).catch((e: unknown) => e);
    expect(err).toMatchObject({ code: 'TIDEMARK_ERR_OPTION_INVALID' });
    expect((err as Error).message).toContain('received 42');
    await expect(monitor(model, { tags: { seed: 3 } } as never)).rejects.toMatchObject({
      code: 'TIDEMARK_ERR_OPTION_INVALID',
      message: expect.stringContaining('tags.seed'),
    });
  });

  it('refuses serve without a SQLite store to serve from, and a port out of range', async () => {
    await expect(monitor(model, { store: 'memory', serve: 0 })).rejects.toMatchObject({
      code: 'TIDEMARK_ERR_OPTION_INVALID',
      message: expect.stringContaining('SQLite'),
    });
    await expect(monitor(model, { store: 'memory', serve: 70000 })).rejects.toMatchObject({ code: 'TIDEMARK_ERR_OPTION_INVALID' });
  });

  it('refuses an uncompiled model before training starts', async () => {
    const raw = tf.sequential({ layers: [tf.layers.dense({ units: 2, inputShape: [3] })] });
    const err = await monitor(raw).catch((e: unknown) => e);
    expect(err).toBeInstanceOf(TypeError);
    expect(err).toMatchObject({ code: 'TIDEMARK_ERR_MODEL_NOT_COMPILED' });
    expect((err as Error).message).toContain('model.compile');
  });

  it('refuses a model without trainable weights', async () => {
    const frozen = tf.sequential({ layers: [tf.layers.dense({ units: 2, inputShape: [3], trainable: false })] });
    frozen.compile({ optimizer: 'sgd', loss: 'meanSquaredError' });
    await expect(monitor(frozen)).rejects.toMatchObject({ code: 'TIDEMARK_ERR_MODEL_NO_TRAINABLE' });
  });

  it('refuses something that is not a model', async () => {
    await expect(monitor({} as never)).rejects.toMatchObject({ code: 'TIDEMARK_ERR_MODEL_INVALID' });
  });
});

describe('monitor windows', () => {
  it("grow from 8 steps ×1.25 a window, then follow epoch ends ('auto')", async () => {
    const model = denseModel({ inputs: 4, hidden: [6], outputs: 2 });
    const { xs, ys } = blobTensors(512, 4, 2); // 64 minibatches of 8 per epoch
    const mon = await monitor(model);
    await model.fit(xs, ys, { epochs: 7, batchSize: 8, verbose: 0, callbacks: [mon.callback] });
    await mon.close();
    const lengths = mon.windows().map((w) => w.batches);
    // 8, 10, 13, 16, 20 during epoch 0 (M unknown), then 24 … 60, then aligned to the epoch end at 320.
    expect(lengths).toEqual([8, 10, 13, 16, 20, 24, 31, 38, 48, 60, 52, 64, 64]);
    const ws = mon.windows();
    expect(ws[0]!.batches_per_epoch).toBeNull();
    expect(ws[ws.length - 1]!.batches_per_epoch).toBe(64);
    expect(ws[ws.length - 1]!.step).toBe(448);
    // A whole-epoch window is a partition of the data: the floor is sqrt((1 − K/M)/K) = 0.
    expect(ws[ws.length - 1]!.snr_floor).toBe(0);
    expect(ws.every((w, i) => i === 0 || w.first_step === ws[i - 1]!.step + 1)).toBe(true);
    // Window 4 (steps 48–67) spans the end of epoch 0: 17 minibatches of one pass, 3 of the next. Each pass
    // is a draw without replacement, so f = Σ k_p(1 − k_p/M)/K (Cochran's finite population correction,
    // from memory; derivation in methods.md §1.4).
    expect(ws[4]!.pass_batches).toEqual([17, 3]);
    const f = (17 * (1 - 17 / 64) + 3 * (1 - 3 / 64)) / 20;
    expect(ws[4]!.snr_floor).toBeCloseTo(Math.sqrt(f / 20), 12);
    expect(ws.at(-1)!.pass_batches).toEqual([64]);
    tf.dispose([xs, ys]);
  });

  it("close at epoch ends with 'epoch' and carry val_loss", async () => {
    const model = denseModel({ inputs: 4, hidden: [6], outputs: 2 });
    const { xs, ys } = blobTensors(200, 4, 2);
    const mon = await monitor(model, { window: 'epoch' });
    await model.fit(xs, ys, { epochs: 3, batchSize: 20, validationSplit: 0.2, verbose: 0, callbacks: [mon.callback] });
    await mon.close();
    const ws = mon.windows();
    expect(ws.map((w) => [w.epoch, w.batches])).toEqual([
      [0, 8],
      [1, 8],
      [2, 8],
    ]);
    for (const w of ws) {
      expect(Number.isFinite(w.logs.loss)).toBe(true);
      expect(Number.isFinite(w.logs.val_loss)).toBe(true);
    }
    tf.dispose([xs, ys]);
  });

  it('merge a one-minibatch remainder into the next window and report a partial window at close', async () => {
    const model = denseModel({ inputs: 4, hidden: [6], outputs: 2 });
    const { xs, ys } = blobTensors(40, 4, 2);
    const mon = await monitor(model, { window: 3 });
    await model.fit(xs, ys, { epochs: 1, batchSize: 4, verbose: 0, callbacks: [mon.callback] }); // 10 steps
    await mon.close();
    // 3, 3, 3, then 1 left: too short for a spread, so no window for it.
    expect(mon.windows().map((w) => w.batches)).toEqual([3, 3, 3]);
    tf.dispose([xs, ys]);
  });
});

describe('monitor faults', () => {
  it('reports non-finite gradients, keeps them out of the statistics and marks them', async () => {
    const model = tf.sequential({
      layers: [tf.layers.dense({ units: 2, inputShape: [1], useBias: false }), tf.layers.dense({ units: 1, useBias: false })],
    });
    model.compile({ optimizer: tf.train.sgd(0), loss: 'meanSquaredError' });
    const [va, vb] = model.layers.map((l) => l.trainableWeights[0]!.read() as tf.Variable);
    const c = collect();
    // A custom loop without training rows: noise measurements off, so the only warning is the one tested.
    const mon = await monitor(model, { window: 4, batchSize: 8, noise: false, onWarning: c.onWarning });
    const steps = [
      [[1, 2], [1, 1]],
      [[3, 2], [2, 2]],
      [[NaN, Infinity], [3, 3]],
      [[1, 4], [4, 4]],
    ];
    for (const [a, b] of steps) {
      const ga = tf.tensor2d([a!], [1, 2]);
      const gb = tf.tensor2d(b!.map((x) => [x]), [2, 1]);
      model.optimizer.applyGradients({ [va!.name]: ga, [vb!.name]: gb });
      tf.dispose([ga, gb]);
    }
    await mon.flush();
    const w = mon.windows()[0]!;
    await mon.close();
    const la = w.layers[model.layers[0]!.name]!;
    const lb = w.layers[model.layers[1]!.name]!;
    expect(la.nonfinite).toBe(2);
    expect(la.batches).toBe(3);
    // Mean of (1,2),(3,2),(1,4) = (5/3, 8/3).
    expect(la.grad_mean_norm ** 2).toBeCloseTo(25 / 9 + 64 / 9, 9);
    expect(lb.nonfinite).toBe(0);
    expect(lb.batches).toBe(4);
    expect(Number.isFinite(w.network.grad_snr)).toBe(true);
    expect(mon.markers().filter((m) => m.kind !== 'advice')).toMatchObject([{ kind: 'nonfinite', layer: model.layers[0]!.name, detected_step: 4 }]);
    expect(c.warnings.map((x) => x.code)).toEqual(['TIDEMARK_ERR_NONFINITE']);
  });

  it('keeps training when the sink fails, and reports it once', async () => {
    const failing: Sink = {
      dropped: 0,
      open: async () => {},
      write: () => {
        throw new Error('disk on fire');
      },
      flush: async () => {
        throw new Error('still on fire');
      },
      close: async () => {},
    };
    const model = denseModel({ inputs: 4, hidden: [6], outputs: 2 });
    const { xs, ys } = blobTensors(128, 4, 2);
    const c = collect();
    const mon = await monitor(model, { store: failing, window: 4, onWarning: c.onWarning });
    const h = await model.fit(xs, ys, { epochs: 2, batchSize: 8, verbose: 0, callbacks: [mon.callback] });
    await mon.close();
    expect(h.history.loss!.length).toBe(2);
    expect(mon.windows().length).toBe(8);
    expect(c.warnings.map((w) => w.code)).toEqual(['TIDEMARK_ERR_SINK_WRITE']);
    expect(c.warnings[0]!.message).toContain('disk on fire');
    tf.dispose([xs, ys]);
  });

  it('degrades to memory when the store cannot be opened', async () => {
    const blocker = join(dir, 'a-file');
    writeFileSync(blocker, 'not a directory');
    const model = denseModel({ inputs: 4, hidden: [6], outputs: 2 });
    const { xs, ys } = blobTensors(64, 4, 2);
    const c = collect();
    const mon = await monitor(model, { store: join(blocker, 'run.jsonl'), window: 4, onWarning: c.onWarning });
    await model.fit(xs, ys, { epochs: 1, batchSize: 8, verbose: 0, callbacks: [mon.callback] });
    await mon.close();
    expect(c.warnings.map((w) => w.code)).toEqual(['TIDEMARK_ERR_SINK_OPEN']);
    expect(mon.windows().length).toBe(2);
    tf.dispose([xs, ys]);
  });

  it('catches a throwing onWindow listener and still calls the others', async () => {
    const model = denseModel({ inputs: 4, hidden: [6], outputs: 2 });
    const { xs, ys } = blobTensors(64, 4, 2);
    const c = collect();
    const mon = await monitor(model, { window: 4, onWarning: c.onWarning });
    let calls = 0;
    mon.onWindow(() => {
      throw new Error('listener bug');
    });
    const off = mon.onWindow(() => void calls++);
    await model.fit(xs, ys, { epochs: 1, batchSize: 8, verbose: 0, callbacks: [mon.callback] });
    off();
    await model.fit(xs, ys, { epochs: 1, batchSize: 8, verbose: 0, callbacks: [mon.callback] });
    await mon.close();
    expect(calls).toBe(2);
    expect(mon.windows().length).toBe(4);
    expect(c.warnings).toMatchObject([{ code: 'TIDEMARK_ERR_LISTENER', message: 'listener bug' }]);
    tf.dispose([xs, ys]);
  });

  it('marks a run whose fit threw as failed in the store', async () => {
    const file = join(dir, 'failed.jsonl');
    const model = denseModel({ inputs: 4, hidden: [6], outputs: 2 });
    const { xs, ys } = blobTensors(64, 4, 2);
    const mon = await monitor(model, { store: file, window: 2, run: 'will-fail' });
    const boom = {
      onBatchEnd: async (batch: number) => {
        if (batch === 4) throw new Error('out of patience');
      },
    };
    await expect(model.fit(xs, ys, { epochs: 1, batchSize: 4, verbose: 0, callbacks: [mon.callback, boom] })).rejects.toThrow();
    await mon.close();
    const records = readFileSync(file, 'utf8').trim().split('\n').map(decodeRecord);
    expect(records[0]).toMatchObject({ type: 'run', run: { name: 'will-fail', id: mon.runId } });
    expect(records.at(-1)).toMatchObject({ type: 'end', status: 'failed', run: mon.runId });
    tf.dispose([xs, ys]);
  });
});

describe('monitor tensor memory', () => {
  async function leakCheck(accumulator: 'js' | 'tensor', useDataset: boolean) {
    const model = denseModel({ inputs: 4, hidden: [8, 6], outputs: 3 });
    const { xs, ys } = blobTensors(512, 4, 3);
    const rows = useDataset ? { x: tf.unstack(xs), y: tf.unstack(ys) } : null;
    const start = tf.memory().numTensors;
    const mon = await monitor(model, { window: 'auto', accumulator });
    expect(mon.accumulator).toBe(accumulator);
    const counts: number[] = [];
    mon.onWindow(() => counts.push(tf.memory().numTensors));
    if (rows !== null) {
      const ds = tf.data.zip({ xs: tf.data.array(rows.x), ys: tf.data.array(rows.y) }).batch(8);
      await model.fitDataset(ds as never, { epochs: 8, verbose: 0, callbacks: [mon.callback] });
    } else {
      await model.fit(xs, ys, { epochs: 8, batchSize: 8, verbose: 0, callbacks: [mon.callback] });
    }
    await mon.close();
    const end = tf.memory().numTensors;
    const steps = mon.windows().at(-1)!.step;
    tf.dispose([xs, ys, ...(rows?.x ?? []), ...(rows?.y ?? [])]);
    return { start, counts, end, steps };
  }

  for (const accumulator of ['js', 'tensor'] as const) {
    for (const useDataset of [false, true]) {
      it(`stays flat over 512 steps through ${useDataset ? 'fitDataset' : 'fit'} (${accumulator} accumulator)`, async () => {
        const r = await leakCheck(accumulator, useDataset);
        expect(r.steps).toBe(512);
        expect(r.counts.length).toBeGreaterThan(8);
        // After the first window the count does not grow, and close() gives back what the monitor held.
        expect(Math.max(...r.counts.slice(1))).toBeLessThanOrEqual(r.counts[0]!);
        expect(r.end).toBe(r.start);
      });
    }
  }
});

describe('monitor accumulators', () => {
  it('give the same statistics on the js and the tensor path', async () => {
    const run = async (accumulator: 'js' | 'tensor') => {
      const model = denseModel({ inputs: 5, hidden: [7], outputs: 3, seed: 4 });
      const { xs, ys } = blobTensors(256, 5, 3);
      const mon = await monitor(model, { window: 8, accumulator });
      await model.fit(xs, ys, { epochs: 2, batchSize: 16, shuffle: false, verbose: 0, callbacks: [mon.callback] });
      await mon.close();
      tf.dispose([xs, ys]);
      return mon.windows();
    };
    const a = await run('js');
    const b = await run('tensor');
    expect(b.length).toBe(a.length);
    for (let i = 0; i < a.length; i++) {
      // The two models' layers have different generated names: compare by position.
      const xa = Object.values(a[i]!.layers);
      const ya = Object.values(b[i]!.layers);
      expect(ya.length).toBe(xa.length);
      for (let l = 0; l < xa.length; l++) {
        const x = xa[l]!;
        const y = ya[l]!;
        for (const f of ['grad_mean_norm', 'grad_std_norm', 'weight_norm', 'weight_travel', 'update_ratio'] as const) {
          expect(Math.abs(y[f] - x[f]) / Math.abs(x[f])).toBeLessThan(1e-4);
        }
      }
    }
  });
});

describe('monitor records', () => {
  it('write a run, its windows and an end record as JSON Lines', async () => {
    const file = join(dir, 'ok.jsonl');
    const model = denseModel({ inputs: 4, hidden: [6], outputs: 2 });
    const { xs, ys } = blobTensors(64, 4, 2);
    const mon = await monitor(model, { store: file, window: 4, group: 'g1', tags: { seed: '3' } });
    // fit shuffles with Math.random: turn it off so the run, and any phase markers it earns, are repeatable.
    await model.fit(xs, ys, { epochs: 2, batchSize: 8, shuffle: false, verbose: 0, callbacks: [mon.callback] });
    await mon.close();
    const records: SinkRecord[] = readFileSync(file, 'utf8').trim().split('\n').map(decodeRecord);
    // Markers go out right after the window that revealed them: the first advice (continue, with its reason) after
    // the first window; the phase detector's markers, and the advice's new stage, after the third.
    expect(records.map((r) => r.type)).toEqual(['run', 'window', 'marker', 'window', 'window', 'marker', 'marker', 'marker', 'marker', 'window', 'end']);
    const markers = records.filter((r) => r.type === 'marker').map((r) => r.marker);
    expect(markers).toEqual(mon.markers());
    const windowSteps = records.filter((r) => r.type === 'window').map((r) => r.window.step);
    expect(markers[0]).toMatchObject({ kind: 'advice', detected_step: windowSteps[0], details: { verdict: 'continue', stage: 'phase-unknown' } });
    for (const m of markers.slice(1)) expect(m.detected_step).toBe(windowSteps[2]);
    expect(markers.filter((m) => m.kind !== 'advice')).toHaveLength(3);
    expect(records[0]).toMatchObject({ run: { group: 'g1', tags: { seed: '3' }, layers: [{ params: 30 }, { params: 14 }] } });
    const w = records[1] as Extract<SinkRecord, { type: 'window' }>;
    expect(w.window).toEqual(mon.windows()[0]);
    expect(records.at(-1)).toMatchObject({ type: 'end', status: 'finished', step: 16 });
    tf.dispose([xs, ys]);
  });
});

describe('monitor with a store that keeps refusing writes', () => {
  it('reports how many records it dropped when it closes', async () => {
    const refusing: Sink = {
      dropped: 7,
      open: async () => {},
      write: () => {},
      flush: async () => {
        throw new Error('database is locked');
      },
      close: async () => {},
    };
    const model = denseModel({ inputs: 4, hidden: [6], outputs: 2 });
    const { xs, ys } = blobTensors(64, 4, 2);
    const c = collect();
    const mon = await monitor(model, { store: refusing, window: 4, onWarning: c.onWarning });
    await model.fit(xs, ys, { epochs: 1, batchSize: 8, verbose: 0, callbacks: [mon.callback] });
    await mon.close();
    expect(c.warnings.map((w) => w.code)).toEqual(['TIDEMARK_ERR_SINK_WRITE', 'TIDEMARK_ERR_SINK_WRITE']);
    expect(c.warnings[0]!.message).toContain('database is locked');
    expect(c.warnings[1]!.message).toContain('7 records could not be stored');
    tf.dispose([xs, ys]);
  });
});

describe('gradients that are exactly zero', () => {
  // ReLU units whose bias is far below any input never fire: their gradient, and that of every weight
  // feeding them, is exactly zero (tfjs' ReLU gradient is the step x > 0).
  /** Trains a model whose hidden layer is dead for two epochs; the monitor, and its gradient-zero warnings. */
  async function trainDead(outputBias: boolean, classes: number) {
    const c = collect();
    const model = tf.sequential();
    model.add(tf.layers.dense({ units: 6, inputShape: [4], activation: 'relu', biasInitializer: tf.initializers.constant({ value: -100 }), name: 'dead_hidden' }));
    model.add(tf.layers.dense({ units: classes, activation: 'softmax', useBias: outputBias, name: 'out' }));
    model.compile({ optimizer: tf.train.sgd(0.1), loss: 'categoricalCrossentropy' });
    const mon = await monitor(model, { store: 'memory', window: 4, noise: false, onWarning: c.onWarning });
    const { xs, ys } = blobTensors(64, 4, classes);
    await model.fit(xs, ys, { epochs: 2, batchSize: 8, shuffle: false, verbose: 0, callbacks: [mon.callback] });
    await mon.close();
    tf.dispose([xs, ys]);
    model.dispose();
    return { mon, zero: c.warnings.filter((w) => w.code === 'TIDEMARK_ERR_GRADIENTS_ZERO') };
  }

  it('says once that the whole network no longer learns, and the advice gives that reason', async () => {
    const { mon, zero } = await trainDead(false, 2);
    expect(zero).toHaveLength(1);
    expect(zero[0]!.message).toContain('every gradient of the network was exactly zero: it no longer learns');
    expect(mon.advice()).toMatchObject({ verdict: 'continue', stage: 'gradients-zero' });
    expect(mon.markers().find((m) => m.kind === 'advice')?.details.reason).toContain('no longer learns');
  });

  it('names dead layers while the rest learns, and they do not hold the advice back', async () => {
    // Three classes in batches of 8 are never balanced, so the output bias always gets a gradient.
    const { mon, zero } = await trainDead(true, 3);
    expect(zero).toHaveLength(1);
    expect(zero[0]!.message).toContain('every gradient of layer dead_hidden was exactly zero: it no longer learns (dead units)');
    expect(mon.advice()!.stage).not.toBe('gradients-zero');
    expect(mon.advice()!.reason).not.toContain('dead_hidden is not known');
  });
});

