import { describe, expect, it } from 'vitest';
import {
  COMPRESSION_DEFAULTS,
  CompressionDetector,
  detectCompression,
  type CompressionEvent,
  type CompressionOptions,
} from '../../src/analysis/compression-detector.js';
import { gaussian, mulberry32 } from '../helpers/random.js';

// Sources:
//  - E. S. Page (1954), "Continuous inspection schemes", Biometrika 41 (volume and pages from memory): the tabular
//    CUSUM C⁻ᵢ = max(0, C⁻ᵢ₋₁ − zᵢ − k), signal when C⁻ᵢ > h; the change is placed after its last zero.
//  - D. C. Montgomery, Introduction to Statistical Quality Control, CUSUM chapter (table number from memory); the
//    ARL table for k = 0.5, h = 4 is verified in methods.md §5.1 against Montgomery & Runger, Table 16-9:
//    two-sided in-control ARL₀ = 168; one-sided 335.368 [computed in methods.md]; out-of-control ARL 8.38 at a
//    1σ shift and 3.34 at 2σ (one- and two-sided agree there to the printed digits).
//  - The detector watches one side only, so its false-alarm yardstick is the one-sided ARL₀ ≈ 335 points.
//  - Box & Muller (1958) for the Gaussian noise (test/helpers/random.ts, from memory); mulberry32 seeds.
//
// Series are in bits (binned I(X;T)); σx is the s.d. of the noise of each probe point, so successive differences
// have s.d. √2·σx and a linear fall of b bits per point is a shift of δ = b/(√2·σx) in the detector's σ units.

const ARL0_ONE_SIDED = 335.368; // methods.md §5.1, h = 4 one-sided upper column [computed]
const ARL_AT_1 = 8.38; // Montgomery's table, k = 0.5, h = 4, δ = 1 [verified in methods.md §5.1]
const ARL_AT_2 = 3.34; // same table, δ = 2

type Point = { step: number; layers: Record<string, number | null> };

const oneLayer = (xs: readonly number[], name = 'dense'): Point[] => xs.map((x, i) => ({ step: 10 * i, layers: { [name]: x } }));

/** Rises by `rise` bits a point up to point `peak`, then falls by `fall` bits a point, plus N(0, σx²) noise. */
function riseFall(seed: number, n: number, peak: number, rise: number, fall: number, sx: number): number[] {
  const r = mulberry32(seed);
  return Array.from({ length: n }, (_, i) => 1 + (i <= peak ? rise * i : rise * peak - fall * (i - peak)) + sx * gaussian(r));
}

const mean = (v: readonly number[]): number => v.reduce((s, x) => s + x, 0) / v.length;

describe('CompressionDetector: a rise, then a sustained fall', () => {
  it('signals once, places the start within 3 points of the true peak and signals after it (one seed, δ = 1)', () => {
    // Page (1954): the fall sum's last zero estimates where the shift began. δ = 0.0283/(√2·0.02) = 1.
    const sx = 0.02;
    const fall = Math.SQRT2 * sx;
    const xs = riseFall(11, 100, 40, 0.05, fall, sx);
    const events = detectCompression(oneLayer(xs));
    expect(events).toHaveLength(1);
    const e = events[0]!;
    expect(e.layer).toBe('dense');
    expect(Math.abs(e.step - 400)).toBeLessThanOrEqual(30); // steps are 10 a point: within 3 points of point 40
    expect(e.detected_step).toBeGreaterThan(400);
    expect(e.detected_step).toBeGreaterThan(e.step);
    expect(e.confidence).toBeGreaterThan(1 - Math.exp(-1)); // the documented rule 1 − exp(−S/h) with S > h
    expect(e.confidence).toBeLessThanOrEqual(1);
    expect(e.details.drop_bits).toBeCloseTo(e.details.peak_bits - e.details.current_bits, 12);
    expect(e.details.drop_bits).toBeGreaterThan(0);
    expect(e.details.points).toBe((e.detected_step - e.step) / 10);
  });

  for (const [delta, arl] of [
    [1, ARL_AT_1],
    [2, ARL_AT_2],
  ] as const) {
    it(`over 500 seeds at δ = ${delta}: every fall found, start within 4 points of the peak for ≥ 95 %, mean delay near Montgomery's ARL(${delta}) = ${arl}`, () => {
      // The fall sum starts near 0 at the peak and gains δ − k a point on average, as the chart of Montgomery's
      // table does after a shift, so the mean delay in points should be close to ARL(δ). The inputs differ
      // (differenced noise, estimated σ, clipped inputs), so the tolerance is ±50 % (common practice, no source).
      // Measured when written: δ = 1 → mean delay 10.3 points (3–37), δ = 2 → 4.1 (3–8).
      const sx = 0.02;
      const fall = delta * Math.SQRT2 * sx;
      const delays: number[] = [];
      let near = 0;
      for (let seed = 1; seed <= 500; seed++) {
        const events = detectCompression(oneLayer(riseFall(seed, 100, 40, 0.05, fall, sx)));
        expect(events).toHaveLength(1);
        const e = events[0]!;
        expect(e.detected_step).toBeGreaterThan(400); // never before the fall began
        if (Math.abs(e.step - 400) <= 40) near++;
        delays.push((e.detected_step - 400) / 10);
      }
      expect(near).toBeGreaterThanOrEqual(475);
      expect(mean(delays)).toBeGreaterThanOrEqual(0.5 * arl);
      expect(mean(delays)).toBeLessThanOrEqual(1.5 * arl);
    });
  }

  it('reproduces the CUSUM trace on a noiseless rise and a 3-point fall at the σ floor: signal at the third falling point', () => {
    // Rise 0.05 bits a point (second differences 0, so σ = minScaleBits = 0.02), then falls of 0.04 bits:
    // z = −2 each, C⁻ = 1.5, 3.0, 4.5 by Page's recursion with k = 0.5; 4.5 > h = 4 signals at the third,
    // and the last zero of C⁻ is the top, point 40. Confidence 1 − exp(−4.5/4) by the documented rule.
    const xs = Array.from({ length: 50 }, (_, i) => (i <= 40 ? 0.05 * i : 2 - 0.04 * (i - 40)));
    const events = detectCompression(oneLayer(xs));
    expect(events).toHaveLength(1);
    expect(events[0]).toMatchObject({ step: 400, detected_step: 430, details: { points: 3, peak_bits: 2 } });
    expect(events[0]!.confidence).toBeCloseTo(1 - Math.exp(-4.5 / 4), 12);
    expect(events[0]!.details.current_bits).toBeCloseTo(1.88, 12);
  });
});

describe('CompressionDetector: the noise scale of successive differences', () => {
  it('reads σ from second differences: a zigzag plateau of ±a gives σ = 1.4826·4a/√3, and a fall of 1.4σ a point signals at its 5th point', () => {
    // For the zigzag x = c ± a, every second difference is ±4a, so σ = 1.4826·median|e|/√3 = 3.4240·a
    // (1.4826 = 1/Φ⁻¹(3/4), the normal-consistency factor of the MAD, from memory; sd(e) = √6σx, sd(d) = √2σx).
    // Plateau inputs ±2a/σ = ±0.584 keep C⁻ ≤ 0.084 and the last one (a rise) sets it to 0; a noiseless fall of
    // b = 1.4σ a point then adds 1.4 − k = 0.9 each: C⁻ = 0.9, 1.8, 2.7, 3.6, 4.5 (Page 1954), so the signal
    // comes at the 5th falling point and the start is the last plateau point. A scale of 1.4826·4a/3 would sit
    // at the 0.02 floor and signal at the 3rd.
    const a = 0.01;
    const sigma = (1.4826 * 4 * a) / Math.sqrt(3);
    const b = 1.4 * sigma;
    const last = 41; // odd: the plateau ends on a rise
    const xs = Array.from({ length: 60 }, (_, i) => (i <= last ? 2 + a * (i % 2 === 1 ? 1 : -1) : 2 + a - b * (i - last)));
    const events = detectCompression(oneLayer(xs));
    expect(events).toHaveLength(1);
    expect(events[0]).toMatchObject({ step: 10 * last, detected_step: 10 * (last + 5), details: { points: 5 } });
    expect(events[0]!.confidence).toBeCloseTo(1 - Math.exp(-4.5 / 4), 9);
    expect(events[0]!.details.peak_bits).toBeCloseTo(2 + a, 12);
  });
});

describe('CompressionDetector: false alarms against the one-sided in-control ARL (Page 1954; Montgomery, k = 0.5, h = 4)', () => {
  // A plain chart on independent in-control inputs signals once per ARL₀ ≈ 335 points on one side. Successive
  // differences of a flat noisy series are negatively correlated and their sum over any stretch is
  // (x_start − x_end)/σ, which does not grow with the stretch, so with a good σ the detector should alarm
  // less often than that; the bound checked is the chart's (expected alarms ≤ points/ARL₀).

  it('pure noise around a level, 1000 seeds × 300 points at σx = 0.1 bits: alarms ≤ points/335', () => {
    let alarms = 0;
    let points = 0;
    for (let seed = 1; seed <= 1000; seed++) {
      const r = mulberry32(seed);
      const xs = Array.from({ length: 300 }, () => 3 + 0.1 * gaussian(r));
      alarms += detectCompression(oneLayer(xs)).length;
      points += xs.length;
    }
    // Measured when written: 6 alarms in 300 000 points (one per 50 000), all within the first 16 points,
    // while σ rests on a handful of second differences; the bound allows 894.
    expect(alarms).toBeLessThanOrEqual(points / ARL0_ONE_SIDED);
  });

  it('pure noise at several noise levels, 200 seeds each: alarms ≤ points/335 at each', () => {
    for (const sx of [0.005, 0.02, 0.05, 0.5]) {
      let alarms = 0;
      for (let seed = 1; seed <= 200; seed++) {
        const r = mulberry32(seed * 31 + 7);
        alarms += detectCompression(oneLayer(Array.from({ length: 300 }, () => 3 + sx * gaussian(r)))).length;
      }
      expect(alarms, `σx = ${sx}`).toBeLessThanOrEqual((200 * 300) / ARL0_ONE_SIDED);
    }
  });

  it('rise then a 400-point noisy plateau, 500 seeds: alarms on the plateau ≤ plateau points/335', () => {
    let alarms = 0;
    for (let seed = 1; seed <= 500; seed++) {
      const r = mulberry32(seed + 5000);
      const xs = Array.from({ length: 440 }, (_, i) => 1 + 0.05 * Math.min(i, 40) + 0.05 * gaussian(r));
      alarms += detectCompression(oneLayer(xs)).length;
    }
    // Measured when written: 0 alarms.
    expect(alarms).toBeLessThanOrEqual((500 * 400) / ARL0_ONE_SIDED);
  });

  it('smooth (near-noiseless) rise, then a plateau with 0.1-bit noise: alarms once σ has caught up obey the bound', () => {
    // The trap: a smooth rise leaves σ at its floor (0.02); the plateau's differences then read as ±7σ. The
    // recent-window median must raise σ within 8 points. Alarms in those first 8 plateau points cannot be told
    // from a real three-point fall. Runs with any alarm are bounded at 15 % (common practice, no source).
    // Measured when written: 79 alarms in the first 8 plateau points (79 runs), 24 in the remaining 232 000
    // points; without the recent window, 825 alarms (most runs).
    let early = 0;
    let late = 0;
    let runsWithAlarm = 0;
    for (let seed = 1; seed <= 1000; seed++) {
      const r = mulberry32(seed);
      const xs = Array.from({ length: 300 }, (_, i) => (i < 60 ? 0.05 * i + 0.001 * gaussian(r) : 3 + 0.1 * gaussian(r)));
      const events = detectCompression(oneLayer(xs));
      if (events.length > 0) runsWithAlarm++;
      for (const e of events) {
        if (e.detected_step / 10 < 68) early++;
        else late++;
      }
    }
    expect(late).toBeLessThanOrEqual((1000 * 232) / ARL0_ONE_SIDED);
    expect(runsWithAlarm).toBeLessThanOrEqual(150);
    expect(early + late).toBeLessThanOrEqual(150);
  });

  it('a one- or two-point dip after a noiseless rise never signals, however deep (σ at its floor)', () => {
    // Inputs are clipped to ±(k + h/2) = ±2.5, so one point adds at most 2 to C⁻ and two add 4, which is not > h
    // (Page's recursion with k = 0.5, h = 4); a third falling point is needed (last test of the first block).
    const base = Array.from({ length: 60 }, (_, i) => 0.05 * i);
    for (const depth of [0.1, 0.5, 3]) {
      const one = base.map((x, i) => (i === 40 ? x - depth : x));
      const two = base.map((x, i) => (i === 40 ? x - depth : i === 41 ? x - 2 * depth : x));
      expect(detectCompression(oneLayer(one)), `one-point dip of ${depth}`).toEqual([]);
      expect(detectCompression(oneLayer(two)), `two-point dip of ${depth}`).toEqual([]);
    }
  });
});

describe('CompressionDetector: no event without a fall', () => {
  it('a monotone rise with noise gives no event (300 seeds, linear and saturating rises)', () => {
    // A rising series moves the fall sum's input mean below 0, which only lengthens its run length beyond ARL₀
    // (Page 1954); over 300 × 150 points the bound points/335 would still allow 134 — none were measured.
    let events = 0;
    for (let seed = 1; seed <= 300; seed++) {
      const r = mulberry32(seed + 100);
      const linear = Array.from({ length: 150 }, (_, i) => 0.03 * i + 0.03 * gaussian(r));
      const saturating = Array.from({ length: 150 }, (_, i) => 4 * (1 - Math.exp(-i / 30)) + 0.03 * gaussian(r));
      events += detectCompression(oneLayer(linear)).length + detectCompression(oneLayer(saturating)).length;
    }
    expect(events).toBe(0);
  });
});

describe('CompressionDetector: re-expansion re-arms', () => {
  it('rise, fall, rise, fall gives two events, each after its own peak; compressing() follows the episodes', () => {
    // Hysteresis: after a signal only the rise side of the CUSUM is watched; its signal (Page 1954, the other
    // side) re-arms the layer. Peaks at points 30 and 90; slopes give δ ≈ 1.8 (falls) and 2.5 (rises) at σx = 0.02.
    const r = mulberry32(4242);
    const shape = (i: number): number =>
      i <= 30 ? 0.07 * i : i <= 60 ? 2.1 - 0.05 * (i - 30) : i <= 90 ? 0.6 + 0.07 * (i - 60) : 2.7 - 0.05 * (i - 90);
    const d = new CompressionDetector();
    const events: CompressionEvent[] = [];
    const state: boolean[] = [];
    for (let i = 0; i <= 120; i++) {
      events.push(...d.push(10 * i, { dense: shape(i) + 0.02 * gaussian(r) }));
      state.push(d.compressing('dense'));
    }
    expect(events).toHaveLength(2);
    expect(Math.abs(events[0]!.step - 300)).toBeLessThanOrEqual(30);
    expect(Math.abs(events[1]!.step - 900)).toBeLessThanOrEqual(30);
    expect(events[0]!.detected_step).toBeGreaterThan(300);
    expect(events[0]!.detected_step).toBeLessThan(600);
    expect(events[1]!.detected_step).toBeGreaterThan(900);
    expect(state[29]).toBe(false);
    expect(state[events[0]!.detected_step / 10]).toBe(true);
    expect(state[59]).toBe(true); // still falling: one event per episode
    expect(state[85]).toBe(false); // re-armed during the second rise
    expect(state[120]).toBe(true);
    expect(d.compressing('other')).toBe(false);
  });

  it('a long fall signals once, not again while it continues', () => {
    // Hysteresis (as above): the fall side is held at 0 while the layer is compressing.
    const xs = riseFall(77, 300, 20, 0.1, 0.03, 0.02);
    expect(detectCompression(oneLayer(xs))).toHaveLength(1);
  });
});

describe('detectCompression: offline equals online, and is causal', () => {
  // Page's CUSUM is a sequential procedure: its decision at point n depends on points 1..n only.
  const r = mulberry32(99);
  const points: Point[] = Array.from({ length: 160 }, (_, i) => {
    const a = (i <= 50 ? 0.06 * i : 3 - 0.04 * (i - 50)) + 0.03 * gaussian(r);
    const b = (i <= 100 ? 0.02 * i : 2 - 0.05 * (i - 100)) + 0.03 * gaussian(r);
    const c = 1 + 0.05 * gaussian(r);
    return { step: 5 * i + 3, layers: { a: i % 7 === 3 ? null : a, b: i % 11 === 5 ? Number.NaN : b, c } };
  });

  it('gives the events of pushing the points one by one', () => {
    const d = new CompressionDetector({ h: 5 });
    const online = points.flatMap((p) => d.push(p.step, p.layers));
    const offline = detectCompression(points, { h: 5 });
    expect(offline.length).toBeGreaterThanOrEqual(2); // layers a and b fall
    expect(offline).toEqual(online);
  });

  it('the events signalled up to point i do not change when later points are appended', () => {
    const full = detectCompression(points);
    expect(full.length).toBeGreaterThanOrEqual(2);
    for (let i = 1; i <= points.length; i++) {
      const upTo = points[i - 1]!.step;
      expect(detectCompression(points.slice(0, i))).toEqual(full.filter((e) => e.detected_step <= upTo));
    }
  });
});

describe('CompressionDetector: warmup', () => {
  it('tests from point `warmup` on: a steep fall from the first point signals at point warmup + 2, placed at point 0', () => {
    // A noiseless fall of 0.5 bits a point at σ = 0.02 (floor) gives clipped inputs of 2.5, adding 2 each to C⁻;
    // the first input is the difference ending at point `warmup`, so C⁻ = 2, 4, 6 (Page 1954) passes h = 4 at
    // the third input, point warmup + 2. Before testing starts the top is the highest point, here point 0.
    const xs = Array.from({ length: 30 }, (_, i) => 10 - 0.5 * i);
    for (const warmup of [1, 3, 10]) {
      const events = detectCompression(oneLayer(xs), { warmup });
      expect(events, `warmup ${warmup}`).toHaveLength(1);
      expect(events[0]).toMatchObject({ step: 0, detected_step: 10 * (warmup + 2), details: { points: warmup + 2, peak_bits: 10 } });
    }
  });
});

describe('CompressionDetector: options and missing values', () => {
  function codeOf(fn: () => unknown): { name: string; code: string } | null {
    try {
      fn();
    } catch (e) {
      return { name: (e as Error).name, code: (e as { code: string }).code };
    }
    return null;
  }

  it('has the documented defaults', () => {
    // k = 0.5, h = 4: the design for a 1σ shift (Montgomery, methods.md §5.1); warmup 3 and the 0.02-bit floor
    // are rules of thumb (common practice, no source).
    expect(COMPRESSION_DEFAULTS).toEqual({ k: 0.5, h: 4, warmup: 3, minScaleBits: 0.02 });
    expect(Object.isFrozen(COMPRESSION_DEFAULTS)).toBe(true);
    expect(new CompressionDetector().options).toEqual(COMPRESSION_DEFAULTS);
    expect(new CompressionDetector({ k: 0.25, h: undefined }).options).toEqual({ ...COMPRESSION_DEFAULTS, k: 0.25 });
  });

  it('rejects bad option values with TIDEMARK_ERR_OPTION_INVALID and unknown names with TIDEMARK_ERR_OPTION_UNKNOWN', () => {
    // The error catalogue of src/errors.ts (project contract).
    const range: CompressionOptions[] = [
      { k: -0.1 },
      { k: Number.NaN },
      { k: Number.POSITIVE_INFINITY },
      { h: 0 },
      { h: -1 },
      { h: Number.POSITIVE_INFINITY },
      { warmup: 0 },
      { warmup: 1.5 },
      { minScaleBits: 0 },
      { minScaleBits: Number.NaN },
    ];
    for (const o of range) expect(codeOf(() => new CompressionDetector(o)), JSON.stringify(o)).toEqual({ name: 'TidemarkRangeError', code: 'TIDEMARK_ERR_OPTION_INVALID' });
    const typed = [{ k: '0.5' }, { h: null }, { warmup: true }] as unknown as CompressionOptions[];
    for (const o of typed) expect(codeOf(() => new CompressionDetector(o))).toEqual({ name: 'TidemarkTypeError', code: 'TIDEMARK_ERR_OPTION_INVALID' });
    expect(codeOf(() => new CompressionDetector({ warmpu: 3 } as unknown as CompressionOptions))).toEqual({
      name: 'TidemarkTypeError',
      code: 'TIDEMARK_ERR_OPTION_UNKNOWN',
    });
    expect(codeOf(() => detectCompression([], { h: 0 }))).toEqual({ name: 'TidemarkRangeError', code: 'TIDEMARK_ERR_OPTION_INVALID' });
    const d = new CompressionDetector();
    expect(codeOf(() => d.push(Number.NaN, { a: 1 }))).toEqual({ name: 'TidemarkTypeError', code: 'TIDEMARK_ERR_OPTION_INVALID' });
    expect(codeOf(() => d.push(1, null as unknown as Record<string, number>))).toEqual({ name: 'TidemarkTypeError', code: 'TIDEMARK_ERR_OPTION_INVALID' });
    expect(codeOf(() => new CompressionDetector({ k: 0, h: 0.5, warmup: 1, minScaleBits: 1e-6 }))).toBeNull();
  });

  it('skips NaN, null and infinite values: the layer sees the same series as if those points were absent', () => {
    // The fall of the first block's trace test (signal at the third falling point), with gaps inserted.
    const xs = Array.from({ length: 50 }, (_, i) => (i <= 40 ? 0.05 * i : 2 - 0.04 * (i - 40)));
    const gaps: (number | null)[] = [];
    const steps: number[] = [];
    xs.forEach((x, i) => {
      if (i % 4 === 1) {
        gaps.push(i % 8 === 1 ? null : i % 3 === 0 ? Number.POSITIVE_INFINITY : Number.NaN);
        steps.push(10 * i + 5);
      }
      gaps.push(x);
      steps.push(10 * i);
    });
    const d = new CompressionDetector();
    const events = gaps.flatMap((x, j) => d.push(steps[j]!, { dense: x }));
    expect(events).toEqual(detectCompression(oneLayer(xs)));
    expect(events).toHaveLength(1);
    // A layer that only ever reports NaN or null has no state and never compresses.
    const e = new CompressionDetector();
    for (let i = 0; i < 20; i++) expect(e.push(i, { empty: i % 2 === 0 ? null : Number.NaN })).toEqual([]);
    expect(e.compressing('empty')).toBe(false);
  });
});
