/**
 * Invented demo scenario: a condition classifier for an industrial gearbox.
 *
 * A simulated accelerometer on the gearbox housing is order-tracked (frequencies in multiples of the input
 * shaft rate, so speed changes do not smear the lines) and reduced to 32 band energies:
 *
 * - bands 0..23 are one order wide, centred on shaft orders 1..24: they resolve the shaft harmonic series,
 *   the gear-mesh line of the 13-tooth pinion (order 13) and its sidebands at 13 ± n;
 * - bands 24..31 are wide, roughly half-octave bands from order 24.5 up to 384: the second mesh harmonic
 *   (order 26) and the housing's structural resonance (near order 150) land here.
 *
 * Each measurement is a 1/f-like broadband floor, a decaying shaft-harmonic series, the mesh line and a small
 * resonance bump, scaled by the machine's sensor gain and the current load, then given a fault signature:
 *
 * - shaft misalignment raises the 2x (and somewhat the 3x) shaft harmonic;
 * - a gear tooth crack modulates the mesh once per revolution, so sidebands grow around orders 13 and 26;
 * - bearing wear adds the outer-race defect lines (non-integer order 3.58 and its multiples) and excites the
 *   high-frequency resonance, raising broadband energy in the top bands.
 *
 * Fault severity varies from barely visible to obvious and every band carries estimation noise, so classes
 * overlap a little; a fraction of labels is then flipped, as happens when technicians log the wrong fault.
 * The features are log band energies standardised over the generated set.
 *
 * Nothing here imports tfjs, so the generator runs anywhere; `toTensors` takes the caller's tfjs module.
 */
import type * as tfjs from '@tensorflow/tfjs';
import { mulberry32 } from '../src/analysis/random.js';

export { mulberry32 };

/**
 * Runs `fn` with Math.random replaced by a seeded generator, and puts it back after. tfjs shuffles fit's
 * minibatches with Math.random (tf.util.shuffle), so this makes a whole training run repeatable.
 */
export async function withSeededShuffle<T>(seed: number, fn: () => Promise<T>): Promise<T> {
  const original = Math.random;
  Math.random = mulberry32(seed);
  try {
    return await fn();
  } finally {
    Math.random = original;
  }
}

/** Class names in label order. */
export const GEARBOX_CLASSES = ['healthy', 'bearing wear', 'gear tooth crack', 'shaft misalignment'] as const;

/** Number of spectral bands (features) per measurement. */
export const GEARBOX_BANDS = 32;

/** Options for {@link makeGearboxData}. */
export interface GearboxDataOptions {
  /** Number of measurements. Default 4000. */
  samples?: number;
  /** PRNG seed; the same seed gives the same data. Default 1. */
  seed?: number;
  /** Fraction of labels replaced by a different, random class. Default 0.08. */
  labelNoise?: number;
  /** Number of simulated machines in the fleet, each with its own gain and spectrum shape. Default 24. */
  machines?: number;
  /**
   * Standardise every band with the mean and spread of the first N measurements only. Default: all of
   * them. Pass the number of rows the model may see, so a held-out tail does not shape the scaling; the
   * first N rows then come out exactly as from a set of N samples with the same seed.
   */
  standardiseOn?: number;
}

/** A generated data set. */
export interface GearboxData {
  /** n x 32 standardised log band energies. */
  x: number[][];
  /** Labels as recorded, label noise included (indices into `classNames`). */
  labels: number[];
  /** The true condition of each measurement, for checking what the noise costs. */
  cleanLabels: number[];
  classNames: string[];
  /** A short name per band, e.g. `order 13` or `orders 64-96`. */
  bandNames: string[];
}

function normalFrom(rand: () => number): () => number {
  return () => {
    // Box-Muller; 1 - u keeps the log argument away from 0.
    const u = 1 - rand();
    const v = rand();
    return Math.sqrt(-2 * Math.log(u)) * Math.cos(2 * Math.PI * v);
  };
}

const MESH_ORDER = 13;
const BPFO_ORDER = 3.58;
const RESONANCE_ORDER = 150;

/** Band edges in shaft orders: 24 one-order bands, then 8 wide ones. */
const BAND_EDGES: number[] = (() => {
  const edges: number[] = [];
  for (let k = 0; k <= 24; k++) edges.push(k + 0.5);
  edges.push(32, 48, 64, 96, 128, 192, 256, 384);
  return edges;
})();

function edge(i: number): number {
  const e = BAND_EDGES[i];
  if (e === undefined) throw new RangeError(`band edge ${i} out of range`);
  return e;
}

function bandOf(order: number): number {
  for (let k = 0; k < GEARBOX_BANDS; k++) {
    if (order >= edge(k) && order < edge(k + 1)) return k;
  }
  return -1;
}

function bandName(k: number): string {
  if (k < 24) return `order ${k + 1}`;
  return `orders ${Math.round(edge(k))}-${Math.round(edge(k + 1))}`;
}

/** Integral of a * o^-alpha over [lo, hi]. */
function powerLawIntegral(a: number, alpha: number, lo: number, hi: number): number {
  if (Math.abs(alpha - 1) < 1e-9) return a * Math.log(hi / lo);
  return (a * (hi ** (1 - alpha) - lo ** (1 - alpha))) / (1 - alpha);
}

/** Energy in [lo, hi] of a bump that is Gaussian in log-order, by a few midpoint steps. */
function resonanceIntegral(peak: number, lo: number, hi: number): number {
  const width = 0.35; // in ln(order): the housing mode is broad
  const steps = 8;
  let sum = 0;
  for (let i = 0; i < steps; i++) {
    const o = lo + ((i + 0.5) * (hi - lo)) / steps;
    const z = Math.log(o / RESONANCE_ORDER) / width;
    sum += peak * Math.exp(-0.5 * z * z);
  }
  return (sum * (hi - lo)) / steps;
}

interface Machine {
  gain: number; // sensor mounting and amplifier, multiplies everything
  alpha: number; // slope of the broadband floor
  shaft: number; // running-speed imbalance level of this unit
  mesh: number; // mesh line level at full load
  resonance: number; // baseline excitation of the housing mode
}

function makeMachine(rand: () => number, normal: () => number): Machine {
  return {
    gain: Math.exp(0.35 * normal()),
    alpha: 0.9 + 0.3 * rand(),
    shaft: Math.exp(0.3 * normal()),
    mesh: Math.exp(0.3 * normal()),
    resonance: Math.exp(0.3 * normal()),
  };
}

/** Linear band energies of one measurement before noise. */
function spectrum(label: number, m: Machine, load: number, severity: number, rand: () => number): number[] {
  const e = new Array<number>(GEARBOX_BANDS).fill(0);
  const line = (order: number, power: number): void => {
    const k = bandOf(order);
    if (k >= 0) e[k] = (e[k] ?? 0) + power;
  };

  // Broadband floor, growing with load (friction, fluid).
  const floor = 0.02 * (0.6 + 0.4 * load);
  for (let k = 0; k < GEARBOX_BANDS; k++) {
    e[k] = (e[k] ?? 0) + powerLawIntegral(floor, m.alpha, edge(k), edge(k + 1));
  }

  // Shaft harmonic series: unbalance at 1x, decaying harmonics, small random phase-like spread.
  for (let h = 1; h <= 10; h++) line(h, m.shaft * 0.4 * h ** -2.2 * (0.8 + 0.4 * rand()));

  // Gear mesh and its second harmonic, with the faint sidebands any real gear pair has.
  const mesh = m.mesh * 0.15 * (0.3 + 0.7 * load) ** 2;
  line(MESH_ORDER, mesh);
  line(2 * MESH_ORDER, 0.3 * mesh);
  for (let n = 1; n <= 3; n++) {
    line(MESH_ORDER - n, 0.01 * mesh);
    line(MESH_ORDER + n, 0.01 * mesh);
  }

  // Housing resonance, lightly excited by normal running.
  const resonancePeak = 2e-4 * m.resonance * (0.5 + 0.5 * load);
  let resonanceGain = 1;

  switch (label) {
    case 1: {
      // Bearing wear: defect impacts at the outer-race rate and its multiples, and they ring the housing mode.
      for (let h = 1; h <= 6; h++) line(h * BPFO_ORDER, 0.004 * severity * h ** -1);
      resonanceGain = 1 + 6 * severity;
      break;
    }
    case 2: {
      // Tooth crack: once-per-revolution modulation puts sidebands around the mesh and its harmonic.
      for (let n = 1; n <= 4; n++) {
        const side = mesh * 0.12 * severity * n ** -0.8;
        line(MESH_ORDER - n, side);
        line(MESH_ORDER + n, side);
        line(2 * MESH_ORDER - n, 0.3 * side);
        line(2 * MESH_ORDER + n, 0.3 * side);
      }
      break;
    }
    case 3: {
      // Misalignment: strong 2x, some 3x, a little 1x.
      const base = m.shaft * 0.4;
      line(2, base * 2 ** -2.2 * 6 * severity);
      line(3, base * 3 ** -2.2 * 2 * severity);
      line(1, base * 0.2 * severity);
      break;
    }
    default:
      break;
  }

  for (let k = 24; k < GEARBOX_BANDS; k++) {
    e[k] = (e[k] ?? 0) + resonanceGain * resonanceIntegral(resonancePeak, edge(k), edge(k + 1));
  }

  return e.map((v) => v * m.gain);
}

/**
 * Generate a seeded gearbox data set: `samples` measurements of 32 standardised log band energies, with
 * balanced classes and `labelNoise` of the labels flipped to another class.
 */
export function makeGearboxData(options: GearboxDataOptions = {}): GearboxData {
  const samples = options.samples ?? 4000;
  const seed = options.seed ?? 1;
  const labelNoise = options.labelNoise ?? 0.08;
  const machineCount = options.machines ?? 24;
  if (!Number.isInteger(samples) || samples < 1) {
    throw new RangeError(`samples must be a positive integer, received ${samples}`);
  }
  if (!(labelNoise >= 0 && labelNoise <= 1)) {
    throw new RangeError(`labelNoise must be in [0, 1], received ${labelNoise}`);
  }
  const scaleRows = options.standardiseOn ?? samples;
  if (!Number.isInteger(scaleRows) || scaleRows < 1 || scaleRows > samples) {
    throw new RangeError(`standardiseOn must be an integer in [1, samples], received ${scaleRows}`);
  }

  const rand = mulberry32(seed);
  const normal = normalFrom(rand);
  const machines = Array.from({ length: machineCount }, () => makeMachine(rand, normal));
  const classes = GEARBOX_CLASSES.length;

  const raw: number[][] = [];
  const cleanLabels: number[] = [];
  const labels: number[] = [];
  for (let i = 0; i < samples; i++) {
    const label = Math.floor(rand() * classes);
    const machine = machines[Math.floor(rand() * machineCount)] ?? machines[0]!;
    const load = 0.3 + 0.7 * rand();
    // Skewed towards mild faults: the early, cheap-to-fix cases are the ones worth detecting.
    const severity = 0.15 + 0.85 * rand() ** 1.5;
    const energies = spectrum(label, machine, load, severity, rand);
    // Averaged periodogram estimates: multiplicative noise, i.e. additive in the log.
    raw.push(energies.map((v) => Math.log(v) + 0.15 * normal()));
    cleanLabels.push(label);
    let recorded = label;
    if (rand() < labelNoise) recorded = (label + 1 + Math.floor(rand() * (classes - 1))) % classes;
    labels.push(recorded);
  }

  // Standardise each band (over the first `scaleRows` rows) so every input sees unit scale.
  const x = raw.map((row) => row.slice());
  const scaling = raw.slice(0, scaleRows);
  for (let k = 0; k < GEARBOX_BANDS; k++) {
    let mean = 0;
    for (const row of scaling) mean += row[k] ?? 0;
    mean /= scaleRows;
    let variance = 0;
    for (const row of scaling) variance += ((row[k] ?? 0) - mean) ** 2;
    const sd = Math.sqrt(variance / scaleRows) || 1;
    for (const row of x) row[k] = ((row[k] ?? 0) - mean) / sd;
  }

  return {
    x,
    labels,
    cleanLabels,
    classNames: [...GEARBOX_CLASSES],
    bandNames: Array.from({ length: GEARBOX_BANDS }, (_, k) => bandName(k)),
  };
}

/** Rows `start` (inclusive) to `end` (exclusive) of a data set, e.g. to hold a tail out of training. */
export function sliceGearboxData(data: GearboxData, start: number, end: number): GearboxData {
  return {
    x: data.x.slice(start, end),
    labels: data.labels.slice(start, end),
    cleanLabels: data.cleanLabels.slice(start, end),
    classNames: data.classNames,
    bandNames: data.bandNames,
  };
}

/** The data as tensors in the caller's tfjs: `xs` (n x 32, float32) and one-hot `ys` (n x classes). */
export function toTensors(
  tf: typeof tfjs,
  data: Pick<GearboxData, 'x' | 'labels' | 'classNames'>,
  labels: number[] = data.labels,
): { xs: tfjs.Tensor2D; ys: tfjs.Tensor2D } {
  const xs = tf.tensor2d(data.x, [data.x.length, GEARBOX_BANDS], 'float32');
  const ys = tf.tidy(() => tf.oneHot(tf.tensor1d(labels, 'int32'), data.classNames.length).toFloat() as tfjs.Tensor2D);
  return { xs, ys };
}

/** Options for {@link buildGearboxModel}. */
export interface GearboxModelOptions {
  /** Seed for the weight initialisers, so a run is repeatable up to fit's shuffling. Default 1. */
  seed?: number;
  /** Plain SGD learning rate. Default 0.01. */
  learningRate?: number;
  /**
   * Units of each hidden tanh layer, input side first: as many layers as entries, 1 to 15 of them (the
   * initialiser seeds are `seed * 16 + i`, so more would reuse another seed's). Default [24, 16, 8].
   */
  hidden?: readonly number[];
}

/**
 * The demo network, 32-24-16-8-4 with tanh and a softmax output (other hidden layers with `hidden`),
 * compiled with plain SGD. Layers are named so tables and stored records read as the architecture rather
 * than as tfjs's counters: `hidden1_24`, …, `output_4`.
 */
export function buildGearboxModel(tf: typeof tfjs, options: GearboxModelOptions = {}): tfjs.Sequential {
  const seed = options.seed ?? 1;
  const learningRate = options.learningRate ?? 0.01;
  const widths = [...(options.hidden ?? [24, 16, 8])];
  if (widths.length < 1 || widths.length > 15 || !widths.every((u) => Number.isInteger(u) && u >= 1)) {
    throw new RangeError(`hidden must list 1 to 15 positive integer widths, received [${widths.join(', ')}]`);
  }
  const model = tf.sequential({ name: 'gearbox_classifier' });
  widths.forEach((units, i) => {
    model.add(
      tf.layers.dense({
        name: `hidden${i + 1}_${units}`,
        units,
        activation: 'tanh',
        ...(i === 0 ? { inputShape: [GEARBOX_BANDS] } : {}),
        kernelInitializer: tf.initializers.glorotUniform({ seed: seed * 16 + i }),
      }),
    );
  });
  model.add(
    tf.layers.dense({
      name: `output_${GEARBOX_CLASSES.length}`,
      units: GEARBOX_CLASSES.length,
      activation: 'softmax',
      kernelInitializer: tf.initializers.glorotUniform({ seed: seed * 16 + widths.length }),
    }),
  );
  model.compile({ optimizer: tf.train.sgd(learningRate), loss: 'categoricalCrossentropy', metrics: ['accuracy'] });
  return model;
}
