/**
 * Seeded, realistic-looking records for storage tests: the shape monitor() produces (layers with
 * kernel and bias variables, a network entry, logs with val_* only where an epoch ended), with the
 * awkward values a real run can hold (NaN update ratio in the first window, null noise scale,
 * infinite SNR) where `specials` asks for them.
 */
import type { LayerInfo, LayerStats, Marker, RunInfo, VariableStats, WindowRecord } from '../../src/protocol/records.js';
import { mulberry32 } from './random.js';

export interface FakeRunOptions {
  id: string;
  name?: string;
  layers?: number;
  group?: string | null;
  tags?: Record<string, string>;
  started_at?: number;
}

export function fakeRun(o: FakeRunOptions): RunInfo {
  const layers: LayerInfo[] = [];
  for (let i = 0; i < (o.layers ?? 3); i++) {
    const name = `dense_Dense${i + 1}`;
    const units = 8 * (i + 1);
    layers.push({
      name,
      class_name: 'Dense',
      params: units * 4 + units,
      variables: [
        { name: `${name}/kernel`, shape: [4, units], params: units * 4 },
        { name: `${name}/bias`, shape: [units], params: units },
      ],
    });
  }
  return {
    id: o.id,
    name: o.name ?? `run ${o.id}`,
    group: o.group ?? null,
    tags: o.tags ?? {},
    started_at: o.started_at ?? 1_700_000_000_000,
    config: { window: 'auto', batchSize: 32, lr: 0.05 },
    layers,
  };
}

function stats(rng: () => number, params: number, specials: boolean, w: number): VariableStats {
  const mean = rng() * 2;
  const std = rng() * 3 + 0.1;
  const snr = mean / std;
  return {
    grad_mean_norm: mean,
    grad_std_norm: std,
    grad_snr: specials && w === 3 ? Infinity : snr,
    grad_snr_db: specials && w === 4 ? -Infinity : 20 * Math.log10(snr),
    noise_scale: specials && w % 5 === 1 ? null : rng() * 500,
    weight_norm: 1 + rng(),
    weight_travel: rng() * 0.1 * (w + 1),
    update_ratio: specials && w === 0 ? Number.NaN : rng() * 1e-3,
    nonfinite: specials && w === 2 ? 7 : 0,
    batches: 8,
    params,
  };
}

/** `count` windows of `run`, 8 minibatches each, 10 windows to an epoch. */
export function fakeWindows(run: RunInfo, count: number, seed = 1, specials = true): WindowRecord[] {
  const rng = mulberry32(seed);
  const out: WindowRecord[] = [];
  for (let w = 0; w < count; w++) {
    const layers: Record<string, LayerStats> = {};
    let params = 0;
    for (const l of run.layers) {
      const variables: Record<string, VariableStats> = {};
      for (const v of l.variables) variables[v.name] = stats(rng, v.params, specials, w);
      layers[l.name] = { ...stats(rng, l.params, specials, w), travel_exponent: w < 3 ? null : 0.5 + rng(), variables };
      params += l.params;
    }
    const network: LayerStats = { ...stats(rng, params, specials, w), travel_exponent: w < 3 ? null : 0.5 + rng() };
    const logs: Record<string, number> = { loss: 1 / (w + 1) + rng() * 0.01, acc: rng() };
    if (w % 10 === 9) logs.val_loss = 1.1 / (w + 1);
    if (specials && w === 6) logs.loss = Number.NaN;
    out.push(windowAt(run, w, { layers, network, logs }));
  }
  return out;
}

/** Window `w` of `run` with these statistics: 8 minibatches of 32, 10 windows to an epoch (80 minibatches). */
export function windowAt(run: RunInfo, w: number, stats: Pick<WindowRecord, 'layers' | 'network' | 'logs'>): WindowRecord {
  return {
    run: run.id,
    index: w,
    step: (w + 1) * 8,
    first_step: w * 8 + 1,
    epoch: Math.floor(w / 10),
    batches: 8,
    batch_size: 32,
    batches_per_epoch: w < 10 ? null : 80,
    pass_batches: [8],
    snr_floor: w < 10 ? 1 / Math.sqrt(8) : Math.sqrt((1 - 8 / 80) / 8),
    time: run.started_at + 1000 * (w + 1) + 0.25,
    ...stats,
  };
}

export function fakeMarkers(run: RunInfo): Marker[] {
  return [
    { run: run.id, layer: 'dense_Dense1', kind: 'drift-start', step: 8, detected_step: 16, confidence: 0.9, details: { snr: 3.5 } },
    { run: run.id, layer: null, kind: 'diffusion-start', step: 40, detected_step: 56, confidence: 0.75, details: { reason: 'SNR < floor', ratio: Infinity } },
    { run: run.id, layer: 'dense_Dense2', kind: 'nonfinite', step: 24, detected_step: 24, confidence: 1, details: {} },
  ];
}
