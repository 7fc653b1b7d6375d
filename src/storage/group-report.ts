/**
 * The runs of a group read together (issue 15), for the command line and the API alike. Per layer and for
 * the network: the step each run's diffusion began (the first online diffusion-start marker), with the
 * median across runs and a bootstrap 95 % interval; the spread of the gradient SNR across runs at the steps
 * of a log grid; and the stop advice each run reached. Runs whose layers have other names are compared by
 * position, and the report says so.
 */
import { bandsAcrossRuns, bootstrapMedianInterval, bootstrapPowerLawExponent, logStepGrid, valuesOnLogSteps, type Band } from '../analysis/group-bands.js';
import { fitPowerLaw, type PowerLawFit } from '../analysis/power-law.js';
import { toAsyncStore, type AnyStore } from './async-store.js';
import type { RunRow } from './store.js';

export interface GroupLayerReport {
  /** The layer's name in the first run (or "(network)"), and its position (null for the network). */
  layer: string;
  position: number | null;
  /** Per run (in the runs' order): the step its diffusion began, or null when it never did. */
  transitions: (number | null)[];
  /** Over the runs that reached it: median step and its percentile-bootstrap 95 % interval (null under 2 runs). */
  transition: { median: number; low: number; high: number; n: number } | null;
  /** grad_snr_db across runs at each step of `grid`. */
  snrDb: Band[];
}

export interface GroupReport {
  group: string;
  runs: Pick<RunRow, 'id' | 'name' | 'status' | 'windows' | 'last_step' | 'tags'>[];
  /** True when the runs' layer names differ, so layers were matched by position. */
  byPosition: boolean;
  grid: number[];
  layers: GroupLayerReport[];
  /** Per run: the first step with a `stop` verdict, or null. */
  stops: (number | null)[];
}

const NETWORK = '(network)';

/** Reads the group's runs (oldest first) and what they share. Null when the group has no runs. */
export async function groupReport(anyStore: AnyStore, group: string, options: { gridPoints?: number; seed?: number } = {}): Promise<GroupReport | null> {
  const store = toAsyncStore(anyStore);
  const rows = (await store.runs({ group, limit: 10_000 })).reverse();
  if (rows.length === 0) return null;
  const details = await Promise.all(rows.map((r) => store.resolveRun(r.id)));
  const markers = await Promise.all(rows.map((r) => store.markers(r.id)));
  const names = details.map((d) => d.layers.map((l) => l.name));
  const width = Math.min(...names.map((n) => n.length));
  const byPosition = names.some((n) => n.slice(0, width).join('\u0000') !== names[0]!.slice(0, width).join('\u0000'));
  const lastStep = Math.max(1, ...rows.map((r) => r.last_step ?? 1));
  const grid = logStepGrid(1, lastStep, options.gridPoints ?? 8);
  const layers: GroupLayerReport[] = [];
  for (const position of [null, ...Array.from({ length: width }, (_, i) => i)]) {
    const transitions = rows.map((_, k) => {
      const name = position === null ? null : names[k]![position]!;
      // Online markers only: an offline re-analysis with other settings is another question.
      const first = markers[k]!.filter((m) => m.kind === 'diffusion-start' && m.layer === name && m.details.source !== 'offline').sort((a, b) => a.step - b.step)[0];
      return first === undefined || !Number.isFinite(first.step) ? null : first.step;
    });
    const series = await Promise.all(
      rows.map((r, k) => store.series(r.id, 'grad_snr_db', { layer: position === null ? null : names[k]![position]! })),
    );
    layers.push({
      layer: position === null ? NETWORK : names[0]![position]!,
      position,
      transitions,
      transition: bootstrapMedianInterval(transitions.filter((t): t is number => t !== null), { seed: options.seed ?? 1 }),
      snrDb: bandsAcrossRuns(series.map((s) => valuesOnLogSteps(s.filter((p) => p.step > 0), grid))),
    });
  }
  const stops = markers.map((ms) => {
    const first = ms.filter((m) => m.kind === 'advice' && m.details.verdict === 'stop').sort((a, b) => a.step - b.step)[0];
    return first === undefined ? null : first.step;
  });
  return {
    group,
    runs: rows.map((r) => ({ id: r.id, name: r.name, status: r.status, windows: r.windows, last_step: r.last_step, tags: r.tags })),
    byPosition,
    grid,
    layers,
    stops,
  };
}


/** What a sweep puts on its y axis, per run. */
export type SweepOutcome = 'diffusion-start' | 'stop';
export const SWEEP_OUTCOMES: readonly SweepOutcome[] = ['diffusion-start', 'stop'];

export interface SweepReport {
  /** The numeric tag on the x axis (depth, batch size, data fraction, …). */
  tag: string;
  outcome: SweepOutcome;
  /** Runs with a numeric tag and the outcome reached; the others are listed in `left`. */
  points: { run: string; x: number; y: number }[];
  left: { run: string; why: string }[];
  /** y = a·x^b by least squares on logs, with b's Student-t 95 % interval; null under 3 usable points. */
  fit: PowerLawFit | null;
  /** b's percentile-bootstrap 95 % interval over runs (pairs resampled); null when no fit. */
  bootstrap: { low: number; high: number } | null;
  /** ln y − (ln a + b·ln x) per point. */
  residuals: number[];
}

/**
 * A sweep over the group's runs: x from a numeric tag, y the step of the network's first diffusion-start
 * (or of the first stop advice); a power law fitted on log-log axes with two intervals for its exponent.
 */
export function sweepOf(report: GroupReport, tag: string, outcome: SweepOutcome, options: { seed?: number } = {}): SweepReport {
  const network = report.layers.find((l) => l.position === null)!;
  const points: SweepReport['points'] = [];
  const left: SweepReport['left'] = [];
  report.runs.forEach((run, k) => {
    const raw = run.tags[tag];
    const x = raw === undefined || raw.trim() === '' ? Number.NaN : Number(raw);
    const y = outcome === 'stop' ? report.stops[k] : network.transitions[k];
    if (!(x > 0) || !Number.isFinite(x)) left.push({ run: run.id, why: raw === undefined ? `no tag ${tag}` : `tag ${tag}=${raw} is not a positive number` });
    else if (y === null || y === undefined || !(y > 0)) left.push({ run: run.id, why: outcome === 'stop' ? 'no stop advice' : 'the network never began to diffuse' });
    else points.push({ run: run.id, x, y });
  });
  const xs = points.map((p) => p.x);
  const ys = points.map((p) => p.y);
  const fit = fitPowerLaw(xs, ys);
  const boot = fit === null ? null : bootstrapPowerLawExponent(xs, ys, { seed: options.seed ?? 1 });
  return {
    tag,
    outcome,
    points,
    left,
    fit,
    bootstrap: boot === null ? null : { low: boot.low, high: boot.high },
    residuals: fit === null ? [] : points.map((p) => Math.log(p.y) - (fit.intercept + fit.slope * Math.log(p.x))),
  };
}
