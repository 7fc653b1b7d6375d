import { describe, expect, it } from 'vitest';
import { travelExponent } from '../../src/analysis/travel-exponent.js';
import { gaussian, mulberry32 } from '../helpers/random.js';

// Source (methods.md §3): ||w_t − w_0|| grows as t for constant drift (§3.2, slope exactly 1) and as sqrt(t)
// for a random walk (§3.1: E||S_t|| = σ·sqrt(t)·E[χ_d], log-log slope exactly 1/2 for every d and t);
// after a drift stops, the squared distance is τ²μ² + t·d·σ² and the local slope drops below 1/2 (§3.3).

/** Geometric window ends: round(first·ratio^k) up to `last`, deduplicated. */
function geometricSteps(first: number, last: number, ratio: number): number[] {
  const out: number[] = [];
  for (let t = first; t <= last * (1 + 1e-12); t *= ratio) {
    const r = Math.round(t);
    if (out.length === 0 || r > out[out.length - 1]!) out.push(r);
  }
  return out;
}

describe('travelExponent', () => {
  it('reads 1.0 for pure drift ||w_t − w_0|| = t·||v||', () => {
    // methods.md §3.2: pure drift S_t = t·v gives slope exactly 1; tolerance ±0.02 per methods.md §3.1.
    const steps = geometricSteps(10, 20_000, 2 ** 0.5);
    const travels = steps.map((t) => 0.037 * t);
    for (let n = 4; n <= steps.length; n++) {
      const b = travelExponent(steps.slice(0, n), travels.slice(0, n));
      if (b === null) continue;
      expect(Math.abs(b - 1)).toBeLessThan(0.02);
    }
    expect(travelExponent(steps, travels)).toBeCloseTo(1, 10);
  });

  it('reads 0.5 ± 0.05 for a Gaussian random walk in 4000 dimensions sampled at geometric window ends', () => {
    // methods.md §3.1: S_t = Σ ξ_s, ξ_s ~ N(0, σ²·I_d), log E||S_t|| = ½·log t + const (slope exactly 1/2).
    // A single walk has relative norm noise about 1/sqrt(2d) (1.1% at d = 4000), which spreads each
    // reading (a fit over a factor-4 range of steps) by roughly 0.01–0.015; every reading must be in ±0.05.
    const d = 4000;
    const T = 1024;
    const rng = mulberry32(1905);
    const ends = new Set(geometricSteps(8, T, 2 ** 0.5));
    const w = new Float64Array(d);
    const steps: number[] = [];
    const travels: number[] = [];
    const readings: number[] = [];
    for (let t = 1; t <= T; t++) {
      for (let j = 0; j < d; j++) w[j] = w[j]! + 0.01 * gaussian(rng);
      if (ends.has(t)) {
        let sq = 0;
        for (let j = 0; j < d; j++) sq += w[j]! * w[j]!;
        steps.push(t);
        travels.push(Math.sqrt(sq));
        const b = travelExponent(steps, travels);
        if (b !== null) readings.push(b);
      }
    }
    expect(readings.length).toBeGreaterThanOrEqual(10);
    for (const b of readings) expect(Math.abs(b - 0.5)).toBeLessThan(0.05);
    // Far from drift: every reading also excludes the drift value 1.
    expect(Math.max(...readings)).toBeLessThan(0.6);
  });

  it('returns null before four windows', () => {
    // API default minWindows = 4.
    expect(travelExponent([], [])).toBeNull();
    expect(travelExponent([10, 20, 40], [1, 2, 4])).toBeNull();
    expect(travelExponent([10, 20, 40, 80], [1, 2, 4, 8])).toBeCloseTo(1, 10);
  });

  it('returns null until the windows span a factor of 2 in steps', () => {
    // API default minSpan = 2: last step / first step of the fitted windows must reach 2.
    expect(travelExponent([100, 120, 140, 160], [1, 1.2, 1.4, 1.6])).toBeNull();
    expect(travelExponent([100, 120, 140, 160, 180], [1, 1.2, 1.4, 1.6, 1.8])).toBeNull();
    expect(travelExponent([100, 120, 140, 160, 180, 200], [1, 1.2, 1.4, 1.6, 1.8, 2])).toBeCloseTo(1, 10);
  });

  it('returns null when the weights have not moved (zero travel cannot be log-fitted)', () => {
    // methods.md §9 notes: points must be positive; drop zero distances.
    expect(travelExponent([10, 20, 40, 80, 160], [0, 0, 0, 0, 0])).toBeNull();
  });

  it('honours minWindows and minSpan options', () => {
    // API options; the series is pure drift so any successful fit reads 1.
    const steps = [10, 20, 40, 80, 160];
    const travels = steps.map((t) => 2 * t);
    expect(travelExponent(steps, travels, { minWindows: 6 })).toBeNull();
    expect(travelExponent(steps.slice(0, 3), travels.slice(0, 3), { minWindows: 3 })).toBeCloseTo(1, 10);
    expect(travelExponent(steps, travels, { minSpan: 100 })).toBeNull();
  });

  it('fits only the recent windows: a series that switches from t to sqrt(t) reads 0.5 once lookback clears the switch', () => {
    // methods.md §3.1/§3.2 slopes 1/2 and 1; lookback (default 4) keeps windows with step ≥ lastStep/4.
    const steps = geometricSteps(1, 3200, 2 ** 0.25);
    const travels = steps.map((t) => (t <= 100 ? t : 100 * Math.sqrt(t / 100)));
    expect(travelExponent(steps, travels)).toBeCloseTo(0.5, 10);
    // A longer lookback reaches back into the drift part and reads between 0.5 and 1.
    const long = travelExponent(steps, travels, { lookback: 1000 })!;
    expect(long).toBeGreaterThan(0.55);
    expect(long).toBeLessThan(1);
  });

  describe('after a drift stops (methods.md §3.3, d = 100, σ = 1, μ = 1, τ = 1000)', () => {
    // Squared distance: min(t, τ)²μ² + t·d·σ² (expected value of ||S_t||², §3.2/§3.3) [computed example:
    // local slope 0.04545 just after τ, 0.25 at 10⁴, 0.4545 at 10⁵, 0.4950 at 10⁶].
    const d = 100;
    const tau = 1000;
    const rms = (t: number): number => Math.sqrt(Math.min(t, tau) ** 2 + t * d);
    const steps = geometricSteps(10, 1e6, 2 ** 0.25);
    const travels = steps.map(rms);
    const upTo = (tMax: number): number | null => {
      const n = steps.filter((t) => t <= tMax).length;
      return travelExponent(steps.slice(0, n), travels.slice(0, n));
    };

    it('reads near 1 at the end of the drift', () => {
      // Local slope (2t²μ² + tdσ²)/(2(t²μ² + tdσ²)) is 0.9545 at t = τ (methods.md §3.2).
      const b = upTo(tau)!;
      expect(b).toBeGreaterThan(0.85);
      expect(b).toBeLessThanOrEqual(1);
    });

    it('drops well below 0.5 (under 0.2) once the fitted windows are all past τ', () => {
      // methods.md §3.3: slope 0.04545 just after τ, rising only to 0.25 by t = 10⁴.
      for (const tMax of [4 * tau, 5 * tau, 6 * tau, 8 * tau]) {
        const b = upTo(tMax)!;
        expect(b).not.toBeNull();
        expect(b).toBeLessThan(0.2);
        expect(b).toBeGreaterThan(0);
      }
    });

    it('approaches 0.5 only slowly from below', () => {
      // methods.md §3.3: local slope 0.4545 at t = 10⁵ and 0.4950 at t = 10⁶.
      const at1e5 = upTo(1e5)!;
      const at1e6 = upTo(1e6)!;
      expect(at1e5).toBeGreaterThan(0.38);
      expect(at1e5).toBeLessThan(0.4545);
      expect(at1e6).toBeGreaterThan(0.48);
      expect(at1e6).toBeLessThan(0.495);
      expect(at1e6).toBeGreaterThan(at1e5);
    });

    it('reads under 0.2 on a simulated seeded walk that drifts for τ steps and then diffuses', () => {
      // Same model simulated: w_t = w_{t−1} + v·[t ≤ τ] + ξ_t, ||v|| = 1, ξ_t ~ N(0, I_100).
      const rng = mulberry32(2017);
      const w = new Float64Array(d);
      const v = new Float64Array(d).fill(1 / Math.sqrt(d));
      const T = 6000;
      const ends = new Set(geometricSteps(10, T, 2 ** 0.25));
      const st: number[] = [];
      const tr: number[] = [];
      let last: number | null = null;
      let atTau: number | null = null;
      for (let t = 1; t <= T; t++) {
        for (let j = 0; j < d; j++) w[j] = w[j]! + (t <= tau ? v[j]! : 0) + gaussian(rng);
        if (ends.has(t)) {
          let sq = 0;
          for (let j = 0; j < d; j++) sq += w[j]! * w[j]!;
          st.push(t);
          tr.push(Math.sqrt(sq));
          last = travelExponent(st, tr);
          if (t <= tau) atTau = last;
        }
      }
      expect(atTau).not.toBeNull();
      expect(atTau!).toBeGreaterThan(0.8);
      expect(last).not.toBeNull();
      expect(last!).toBeLessThan(0.2);
    });
  });
});
