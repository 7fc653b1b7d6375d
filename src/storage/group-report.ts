/**
 * The runs of a group read together (issue 15), for the command line and the API alike. Per layer and for
 * the network: the step each run's diffusion began (the first online diffusion-start marker), with the
 * median across runs and a bootstrap 95 % interval; the spread of the gradient SNR, noise scale and weight
 * travel across runs at the steps of a log grid; and what each run reached. Runs with as many layers as each
 * other are compared by position (tfjs numbers automatic layer names per process, so equal networks often
 * carry other names); runs of different depths only on the layers every one of them names alike, and the
 * report lists the rest (matchLayers).
 */
import { bandsAcrossRuns, bootstrapMedianInterval, bootstrapPowerLawExponent, logGrid, logStepGrid, valuesInLogBins, valuesOnLogSteps, type Band } from '../analysis/group-bands.js';
import { fitPowerLaw, type PowerLawFit } from '../analysis/power-law.js';
import type { Marker } from '../protocol/records.js';
import { toAsyncStore, type AnyStore, type AsyncStore } from './async-store.js';
import type { RunRow, SeriesPoint } from './store.js';

/** The x axis the runs are put on: minibatch steps, or epochs (step ÷ the run's minibatches per epoch). */
export type GroupAlign = 'step' | 'epoch';
export const GROUP_ALIGNS: readonly GroupAlign[] = ['step', 'epoch'];

export interface GroupOptions {
  /** Align the runs by step or by epoch. Default 'step'. */
  align?: GroupAlign;
  /** Points of the log grid the bands are given on. Default 8. */
  gridPoints?: number;
  /** Seed of the bootstrap. Default 1. */
  seed?: number;
}

export interface GroupLayerReport {
  /** The layer's name in the first run (or "(network)"), and its position (null for the network). */
  layer: string;
  position: number | null;
  /** Per run (in the runs' order): where its diffusion began (step or epoch, as `align`), or null when it never did. */
  transitions: (number | null)[];
  /** Over the runs that reached it: median and its percentile-bootstrap 95 % interval (null under 2 runs). */
  transition: { median: number; low: number; high: number; n: number } | null;
  /**
   * Across runs at each point of `grid`: grad_snr_db, the noise scale (examples) and the weight travel
   * ‖w − w₀‖. The noise scale is measured only now and then, so each run gives the median of its
   * measurements in the point's stretch of the log axis (none: not counted); the others are interpolated.
   */
  snrDb: Band[];
  noiseScale: Band[];
  weightTravel: Band[];
}

/** What one run of the group reached, each place in the units of `align` (null: not reached). */
export interface GroupRunOutcome {
  /** The first `may-stop` and the first `stop` advice. */
  mayStop: number | null;
  stop: number | null;
  /** The latest advice verdict, and where it was given. */
  advice: { verdict: string; at: number } | null;
  /** The best validation value logged (val accuracy if logged, highest; else val_loss, lowest) and where. */
  bestValidation: { metric: string; value: number; at: number } | null;
  /** Where the training loss (window mean) first reached the target, when one was asked for. */
  lossTarget: number | null;
}

export interface GroupReport {
  group: string;
  runs: Pick<RunRow, 'id' | 'name' | 'status' | 'windows' | 'last_step' | 'tags'>[];
  align: GroupAlign;
  /**
   * Runs left out of an epoch alignment because their epoch length is unknown (outside fit); their ids.
   * Their transitions and outcomes read null.
   */
  unaligned: string[];
  /** True when the runs have as many layers as each other but name them differently: matched by position. */
  byPosition: boolean;
  /**
   * Layer names left out because not every run has a layer of that name (runs of different depths are
   * matched by name only), in the order the runs first name them. Empty when every layer was matched.
   */
  leftOut: string[];
  /** Steps (or epochs) of a log grid from the first to the last the runs reached; bands are given here. */
  grid: number[];
  layers: GroupLayerReport[];
  /** Per run: the first step (or epoch) with a `stop` verdict, or null. Same as outcomes[k].stop. */
  stops: (number | null)[];
  outcomes: GroupRunOutcome[];
}

const NETWORK = '(network)';
/** Measured now and then rather than every window: binned on the grid, not interpolated (valuesInLogBins). */
const SPARSE = new Set(['noise_scale']);
const VAL_ACCURACY = ['val_acc', 'val_accuracy'];

/** Where a run's step falls on the group's axis: the step itself, or steps ÷ minibatches per epoch. */
type ToAxis = (step: number) => number;

/** A run's minibatches per epoch, from its last window that knows it; null outside fit. */
async function batchesPerEpoch(store: AsyncStore, row: RunRow): Promise<number | null> {
  if (row.last_step === null) return null;
  const last = await store.windows(row.id, { from: row.last_step, to: row.last_step, variables: false });
  const m = last[0]?.batches_per_epoch ?? null;
  return m !== null && m > 0 ? m : null;
}

/** The first step at which each run's training loss (window mean) was at or under `target`. */
function firstAtOrBelow(points: readonly SeriesPoint[], target: number): number | null {
  return points.find((p) => Number.isFinite(p.value) && p.value <= target)?.step ?? null;
}

/**
 * Reads the group's runs (oldest first) and what they share. Null when the group has no runs. With
 * `lossTarget`, each run's outcome says where its training loss first reached it.
 */
export async function groupReport(anyStore: AnyStore, group: string, options: GroupOptions & { lossTarget?: number } = {}): Promise<GroupReport | null> {
  const store = toAsyncStore(anyStore);
  const align = options.align ?? 'step';
  const rows = (await store.runs({ group, limit: 10_000 })).reverse();
  if (rows.length === 0) return null;
  const details = await Promise.all(rows.map((r) => store.resolveRun(r.id)));
  const markers = await Promise.all(rows.map((r) => store.markers(r.id)));
  const perEpoch = align === 'epoch' ? await Promise.all(rows.map((r) => batchesPerEpoch(store, r))) : rows.map(() => null);
  const toAxis: (ToAxis | null)[] = rows.map((_, k) => (align === 'step' ? (s: number) => s : perEpoch[k] === null ? null : (s: number) => s / perEpoch[k]!));
  const at = (k: number, step: number | null): number | null => (step === null || toAxis[k] === null ? null : toAxis[k]!(step));
  const names = details.map((d) => d.layers.map((l) => l.name));
  const { columns, byPosition, leftOut } = matchLayers(names);
  const ends = rows.map((r, k) => at(k, r.last_step ?? null)).filter((e): e is number => e !== null && e > 0);
  const starts = rows.map((_, k) => at(k, 1)).filter((e): e is number => e !== null);
  const last = Math.max(...ends, align === 'step' ? 1 : Math.min(...starts, 1));
  const first = align === 'step' ? 1 : Math.min(...starts, last);
  const gridPoints = options.gridPoints ?? 8;
  const grid = align === 'step' ? logStepGrid(first, last, gridPoints) : logGrid(first, last, gridPoints);
  // Each run's series of one metric, moved to the group's axis and put on its grid.
  const onGrid = async (metric: string, layer: string | null, k: number): Promise<number[]> => {
    if (toAxis[k] === null) return grid.map(() => Number.NaN);
    const points = (await store.series(rows[k]!.id, metric, { layer })).filter((p) => p.step > 0);
    const moved = points.map((p) => ({ step: toAxis[k]!(p.step), value: p.value }));
    return SPARSE.has(metric) ? valuesInLogBins(moved, grid) : valuesOnLogSteps(moved, grid);
  };
  const bands = async (metric: string, column: readonly string[] | null): Promise<Band[]> =>
    bandsAcrossRuns(await Promise.all(rows.map((_, k) => onGrid(metric, column === null ? null : column[k]!, k))));
  const layers: GroupLayerReport[] = [];
  for (const column of [null, ...columns]) {
    const position = column === null ? null : names[0]!.indexOf(column[0]!);
    const transitions = rows.map((_, k) => {
      const name = column === null ? null : column[k]!;
      // Online markers only: an offline re-analysis with other settings is another question.
      const found = markers[k]!.filter((m) => m.kind === 'diffusion-start' && m.layer === name && m.details.source !== 'offline').sort((a, b) => a.step - b.step)[0];
      return found === undefined || !Number.isFinite(found.step) ? null : at(k, found.step);
    });
    layers.push({
      layer: column === null ? NETWORK : column[0]!,
      position,
      transitions,
      transition: bootstrapMedianInterval(transitions.filter((t): t is number => t !== null), { seed: options.seed ?? 1 }),
      snrDb: await bands('grad_snr_db', column),
      noiseScale: await bands('noise_scale', column),
      weightTravel: await bands('weight_travel', column),
    });
  }
  const outcomes = await Promise.all(rows.map((r, k) => runOutcome(store, r, markers[k]!, (s) => at(k, s), options.lossTarget)));
  return {
    group,
    runs: rows.map((r) => ({ id: r.id, name: r.name, status: r.status, windows: r.windows, last_step: r.last_step, tags: r.tags })),
    align,
    unaligned: rows.filter((_, k) => toAxis[k] === null).map((r) => r.id),
    byPosition,
    leftOut,
    grid,
    layers,
    stops: outcomes.map((o) => o.stop),
    outcomes,
  };
}

/**
 * Which layer of each run is compared with which: one column per compared layer, holding each run's
 * layer name. Equal depths: by position. Different depths: a position means another thing in each (the
 * output layer of a shallow net against a hidden layer of a deep one), so only names all runs share.
 */
export function matchLayers(names: readonly (readonly string[])[]): { columns: string[][]; byPosition: boolean; leftOut: string[] } {
  const first = names[0] ?? [];
  if (names.every((n) => n.length === first.length)) {
    const byPosition = names.some((n) => n.some((name, i) => name !== first[i]));
    return { columns: first.map((_, i) => names.map((n) => n[i]!)), byPosition, leftOut: [] };
  }
  const shared = first.filter((name) => names.every((n) => n.includes(name)));
  const leftOut = [...new Set(names.flat())].filter((name) => !shared.includes(name));
  return { columns: shared.map((name) => names.map(() => name)), byPosition: false, leftOut };
}

async function runOutcome(store: AsyncStore, row: RunRow, markers: readonly Marker[], at: (step: number | null) => number | null, lossTarget: number | undefined): Promise<GroupRunOutcome> {
  const advice = markers.filter((m) => m.kind === 'advice' && typeof m.details.verdict === 'string').sort((a, b) => a.step - b.step);
  const firstOf = (verdict: string): number | null => at(advice.find((m) => m.details.verdict === verdict)?.step ?? null);
  const latest = advice[advice.length - 1];
  const keys = new Set((await store.seriesKeys(row.id)).filter((k) => k.scope === 'run').map((k) => k.metric));
  const accuracy = VAL_ACCURACY.find((m) => keys.has(m));
  const metric = accuracy ?? (keys.has('val_loss') ? 'val_loss' : null);
  let bestValidation: GroupRunOutcome['bestValidation'] = null;
  if (metric !== null) {
    const higher = metric !== 'val_loss';
    let best: SeriesPoint | null = null;
    for (const p of await store.series(row.id, metric)) {
      // The first of equal bests: the earliest place the value was reached.
      if (Number.isFinite(p.value) && (best === null || (higher ? p.value > best.value : p.value < best.value))) best = p;
    }
    const where = best === null ? null : at(best.step);
    if (best !== null && where !== null) bestValidation = { metric, value: best.value, at: where };
  }
  const loss = lossTarget === undefined || !keys.has('loss') ? null : firstAtOrBelow(await store.series(row.id, 'loss'), lossTarget);
  return {
    mayStop: firstOf('may-stop'),
    stop: firstOf('stop'),
    advice: latest === undefined || at(latest.step) === null ? null : { verdict: String(latest.details.verdict), at: at(latest.step)! },
    bestValidation,
    lossTarget: at(loss),
  };
}

/** What a sweep puts on its y axis, per run. */
export type SweepOutcome = 'diffusion-start' | 'stop' | 'loss-target' | 'best-validation';
export const SWEEP_OUTCOMES: readonly SweepOutcome[] = ['diffusion-start', 'stop', 'loss-target', 'best-validation'];

export interface SweepReport {
  /** The numeric tag on the x axis (depth, batch size, data fraction, …). */
  tag: string;
  outcome: SweepOutcome;
  /** What y counts: steps or epochs (as the report's `align`), or the validation metric's name. */
  units: string;
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

const NOT_REACHED: Record<SweepOutcome, string> = {
  'diffusion-start': 'the network never began to diffuse',
  stop: 'no stop advice',
  'loss-target': 'the training loss never reached the target (or none was given)',
  'best-validation': 'no validation value logged',
};

/**
 * A sweep over the group's runs: x from a numeric tag, y where the network's diffusion began (or the first
 * stop advice, or the training loss reached its target: in steps or epochs as the report is aligned), or
 * the best validation value; a power law fitted on log-log axes with two intervals for its exponent.
 */
export function sweepOf(report: GroupReport, tag: string, outcome: SweepOutcome, options: { seed?: number } = {}): SweepReport {
  const network = report.layers.find((l) => l.position === null)!;
  const points: SweepReport['points'] = [];
  const left: SweepReport['left'] = [];
  const metrics = new Set<string>();
  report.runs.forEach((run, k) => {
    const raw = run.tags[tag];
    const x = raw === undefined || raw.trim() === '' ? Number.NaN : Number(raw);
    const o = report.outcomes[k]!;
    const best = o.bestValidation;
    if (outcome === 'best-validation' && best !== null) metrics.add(best.metric);
    const y = outcome === 'stop' ? o.stop : outcome === 'loss-target' ? o.lossTarget : outcome === 'best-validation' ? (best?.value ?? null) : network.transitions[k];
    if (!(x > 0) || !Number.isFinite(x)) left.push({ run: run.id, why: raw === undefined ? `no tag ${tag}` : `tag ${tag}=${raw} is not a positive number` });
    else if (report.unaligned.includes(run.id)) left.push({ run: run.id, why: 'its epoch length is unknown' });
    else if (y === null || y === undefined || !(y > 0)) left.push({ run: run.id, why: NOT_REACHED[outcome] });
    else points.push({ run: run.id, x, y });
  });
  const xs = points.map((p) => p.x);
  const ys = points.map((p) => p.y);
  const fit = fitPowerLaw(xs, ys);
  const boot = fit === null ? null : bootstrapPowerLawExponent(xs, ys, { seed: options.seed ?? 1 });
  return {
    tag,
    outcome,
    units: outcome === 'best-validation' ? [...metrics].join(' / ') || 'validation' : report.align === 'epoch' ? 'epochs' : 'steps',
    points,
    left,
    fit,
    bootstrap: boot === null ? null : { low: boot.low, high: boot.high },
    residuals: fit === null ? [] : points.map((p) => Math.log(p.y) - (fit.intercept + fit.slope * Math.log(p.x))),
  };
}
