/**
 * Page's (1954) tabular CUSUM on standardised inputs z = (x − μ₀)/σ:
 *   C⁺ᵢ = max(0, C⁺ᵢ₋₁ + zᵢ − k),  C⁻ᵢ = max(0, C⁻ᵢ₋₁ − zᵢ − k),
 * signalling when either exceeds h. k is half the shift to detect (in σ units); h = 4 or 5 gives the
 * average run lengths of Montgomery's table (methods.md §5.1).
 */

import { checkOptions, type OptionSchema } from '../option-check.js';

export interface CusumOptions {
  /** Reference value (allowance), in σ units. Default 0.5. */
  k?: number;
  /** Decision interval, in σ units. Default 4. */
  h?: number;
  /** Fast initial response: start both sums here (Lucas & Crosier 1982). Default 0. */
  headStart?: number;
}

export interface CusumState {
  upper: number;
  lower: number;
  /** Index of the last input at which each sum was 0: the change is estimated just after it. */
  upperZeroAt: number;
  lowerZeroAt: number;
  /** Inputs seen. */
  n: number;
}

const CUSUM_RULES: OptionSchema = Object.freeze({
  k: { type: 'number', min: 0 },
  h: { type: 'number', above: 0 },
  headStart: { type: 'number', min: 0 },
});

export type CusumSignal = 'up' | 'down' | null;

export class Cusum {
  readonly k: number;
  readonly h: number;
  private readonly headStart: number;
  private s: CusumState;

  constructor(options: CusumOptions = {}) {
    const o = checkOptions<Required<CusumOptions>>(options, CUSUM_RULES, { k: 0.5, h: 4, headStart: 0 }, { owner: 'Cusum' });
    this.k = o.k;
    this.h = o.h;
    this.headStart = o.headStart;
    this.s = this.initial();
  }

  private initial(): CusumState {
    return { upper: this.headStart, lower: this.headStart, upperZeroAt: -1, lowerZeroAt: -1, n: 0 };
  }

  get state(): Readonly<CusumState> {
    return this.s;
  }

  /** Adds one standardised input (index n, from 0); returns which side signalled, if any. */
  push(z: number): CusumSignal {
    const s = this.s;
    const i = s.n;
    s.upper = Math.max(0, s.upper + z - this.k);
    s.lower = Math.max(0, s.lower - z - this.k);
    if (s.upper === 0) s.upperZeroAt = i;
    if (s.lower === 0) s.lowerZeroAt = i;
    s.n++;
    if (s.upper > this.h) return 'up';
    if (s.lower > this.h) return 'down';
    return null;
  }

  /** Restarts one side's sum; the other keeps its evidence. */
  resetSide(side: 'up' | 'down'): void {
    const s = this.s;
    if (side === 'up') {
      s.upper = 0;
      s.upperZeroAt = s.n - 1;
    } else {
      s.lower = 0;
      s.lowerZeroAt = s.n - 1;
    }
  }

  /** Restarts both sums (after a signal has been acted on). The input count continues. */
  reset(): void {
    const n = this.s.n;
    this.s = this.initial();
    this.s.n = n;
    this.s.upperZeroAt = n - 1;
    this.s.lowerZeroAt = n - 1;
  }
}

/**
 * Siegmund's approximation of a one-sided CUSUM's average run length for a shift δ (σ units):
 * with Δ = δ − k and b = h + 1.166, ARL ≈ (exp(−2Δb) + 2Δb − 1)/(2Δ²), or b² at Δ = 0.
 * From memory (methods.md §5.1); a quick estimate, 10–15% off for δ ≥ 3.
 */
export function siegmundArl(delta: number, k = 0.5, h = 4): number {
  const d = delta - k;
  const b = h + 1.166;
  if (Math.abs(d) < 1e-12) return b * b;
  return (Math.exp(-2 * d * b) + 2 * d * b - 1) / (2 * d * d);
}
