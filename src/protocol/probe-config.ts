/**
 * Reading a run's config.probe (what the probe's describe() writes) defensively: stores written by older
 * versions, or imported, may lack parts of it or hold other types. Null wherever it does not say. The CLI's
 * `show` and the page's information plane both read it here.
 */

export interface ProbeConfig {
  rows: number | null;
  every: number | string | null;
  budget: number | null;
  classes: number | null;
  binned: { estimator: string | null; bins: number | null; marginBits: number | null };
  /** Null when the config records no pairwise bounds (turned off, or a run before them). */
  bounds: { estimator: string | null; noiseRatio: number | null; noiseVariance: number | null; rows: number | null } | null;
  /** Null when the config records no linear read-out (turned off, or a run before it). */
  linear: { estimator: string | null; rows: number | null; folds: number | null } | null;
}

const record = (v: unknown): Record<string, unknown> | null => (typeof v === 'object' && v !== null && !Array.isArray(v) ? (v as Record<string, unknown>) : null);
const num = (v: unknown): number | null => (typeof v === 'number' && Number.isFinite(v) ? v : null);
const str = (v: unknown): string | null => (typeof v === 'string' ? v : null);

export function readProbeConfig(config: Record<string, unknown>): ProbeConfig {
  const p = record(config.probe) ?? {};
  const binned = record(p.binned) ?? {};
  const bounds = record(p.bounds);
  const linear = record(p.linear);
  return {
    rows: num(p.rows),
    every: typeof p.every === 'number' || typeof p.every === 'string' ? p.every : null,
    budget: num(p.budget),
    classes: num(record(p.labels)?.classes),
    binned: { estimator: str(binned.estimator), bins: num(binned.bins), marginBits: num(binned.saturation_margin_bits) },
    bounds:
      bounds === null
        ? null
        : { estimator: str(bounds.estimator), noiseRatio: num(bounds.noise_ratio), noiseVariance: num(bounds.noise_variance), rows: num(bounds.rows) },
    linear: linear === null ? null : { estimator: str(linear.estimator), rows: num(linear.rows), folds: num(linear.folds) },
  };
}
