/**
 * What the group view (`#/group/NAME`) computes from a group report before drawing it, with no DOM: its
 * address, the API query, which tags can be swept, a band's outline on the chart's scales, the fitted power
 * law's line, and whether a live update of the runs list concerns the group.
 */
import type { RunSummary } from '../protocol/messages.js';
import type { Band } from '../analysis/group-bands.js';
import type { GroupAlign, GroupReport, SweepOutcome, SweepReport } from '../storage/group-report.js';

export type { GroupAlign, GroupReport, SweepOutcome, SweepReport, Band };

export const GROUP_ALIGN_CHOICES: readonly GroupAlign[] = ['step', 'epoch'];
export const SWEEP_OUTCOME_CHOICES: readonly SweepOutcome[] = ['diffusion-start', 'stop', 'loss-target', 'best-validation'];

/** What a group view shows, as its address says. */
export interface GroupRoute {
  name: string;
  align: GroupAlign;
  /** The numeric tag on the sweep's x axis; null: no sweep drawn. */
  sweep: string | null;
  outcome: SweepOutcome;
  /** The training-loss target of the loss-target outcome. */
  lossTarget: number | null;
}

/** Points of the log grid the page asks for: enough for a smooth band, few enough to read as measurements. */
export const GROUP_GRID_POINTS = 40;

/** The view's address: `#/group/NAME?align=epoch&sweep=depth&outcome=stop&target=0.3` (defaults left out). */
export function groupHash(r: GroupRoute): string {
  const q = new URLSearchParams();
  if (r.align !== 'step') q.set('align', r.align);
  if (r.sweep !== null) q.set('sweep', r.sweep);
  if (r.outcome !== 'diffusion-start') q.set('outcome', r.outcome);
  if (r.lossTarget !== null) q.set('target', String(r.lossTarget));
  const rest = q.toString();
  return `#/group/${encodeURIComponent(r.name)}${rest === '' ? '' : `?${rest}`}`;
}

/** The route from the fragment's path part (after `/group/`) and its query; unknown values fall back to the defaults. */
export function groupRouteOf(name: string, q: URLSearchParams): GroupRoute {
  const align = q.get('align');
  const outcome = q.get('outcome');
  const target = Number(q.get('target') ?? Number.NaN);
  return {
    name,
    align: GROUP_ALIGN_CHOICES.includes(align as GroupAlign) ? (align as GroupAlign) : 'step',
    sweep: q.get('sweep') || null,
    outcome: SWEEP_OUTCOME_CHOICES.includes(outcome as SweepOutcome) ? (outcome as SweepOutcome) : 'diffusion-start',
    lossTarget: Number.isFinite(target) && target > 0 ? target : null,
  };
}

/** The API path that answers the route (relative, so the page works under any base path). */
export function groupQuery(r: GroupRoute): string {
  const q = new URLSearchParams({ align: r.align, points: String(GROUP_GRID_POINTS) });
  if (r.sweep !== null) q.set('sweep', r.sweep);
  if (r.sweep !== null) q.set('outcome', r.outcome);
  if (r.lossTarget !== null) q.set('lossTarget', String(r.lossTarget));
  return `api/groups/${encodeURIComponent(r.name)}?${q.toString()}`;
}

/** Tags that can be an x axis: a positive number in at least two runs, with at least two different values. */
export function numericTags(runs: readonly { tags: Record<string, string> }[]): string[] {
  const values = new Map<string, Set<number>>();
  for (const r of runs) {
    for (const [k, v] of Object.entries(r.tags)) {
      const x = v.trim() === '' ? Number.NaN : Number(v);
      if (!(x > 0) || !Number.isFinite(x)) continue;
      if (!values.has(k)) values.set(k, new Set());
      values.get(k)!.add(x);
    }
  }
  const counts = new Map<string, number>();
  for (const r of runs) for (const k of Object.keys(r.tags)) if (values.has(k) && Number(r.tags[k]) > 0) counts.set(k, (counts.get(k) ?? 0) + 1);
  return [...values].filter(([k, s]) => s.size >= 2 && (counts.get(k) ?? 0) >= 2).map(([k]) => k).sort();
}

/** One band's outline on the grid: the points where at least one run has a value (and, on a log scale, a positive one). */
export interface BandPath {
  x: number[];
  min: number[];
  q1: number[];
  median: number[];
  q3: number[];
  max: number[];
  /** Runs with a value at each of those points. */
  n: number[];
}

export function bandPath(grid: readonly number[], bands: readonly Band[], logScale: boolean): BandPath {
  const out: BandPath = { x: [], min: [], q1: [], median: [], q3: [], max: [], n: [] };
  bands.forEach((b, g) => {
    const x = grid[g];
    if (x === undefined || !(x > 0) || b.n === 0) return;
    // On a log scale a band is drawn where even its lowest run is positive.
    if (logScale && !(b.min > 0)) return;
    out.x.push(x);
    out.min.push(b.min);
    out.q1.push(b.q1);
    out.median.push(b.median);
    out.q3.push(b.q3);
    out.max.push(b.max);
    out.n.push(b.n);
  });
  return out;
}

/** The fitted law's two ends over the points' x range: y = e^intercept · x^slope. */
export function sweepLine(w: SweepReport): { x: number; y: number }[] {
  if (w.fit === null || w.points.length === 0) return [];
  const xs = w.points.map((p) => p.x);
  const lo = Math.min(...xs);
  const hi = Math.max(...xs);
  const at = (x: number): number => Math.exp(w.fit!.intercept + w.fit!.slope * Math.log(x));
  return [
    { x: lo, y: at(lo) },
    { x: hi, y: at(hi) },
  ];
}

/** The exponent and its two intervals, in one sentence for the page (the same numbers as `tidemark group --sweep`). */
export function sweepSentence(w: SweepReport): string {
  if (w.fit === null) return `Too few runs with a positive ${w.tag} and the outcome for a fit (3 needed; ${w.points.length} now).`;
  const f = (v: number): string => v.toFixed(3);
  const boot = w.bootstrap === null ? '' : `; [${f(w.bootstrap.low)}, ${f(w.bootstrap.high)}] by bootstrap over runs`;
  return `Exponent b = ${f(w.fit.slope)}, 95 % interval [${f(w.fit.ci95[0])}, ${f(w.fit.ci95[1])}] (Student-t over ${w.fit.n} runs)${boot}; R² ${w.fit.rSquared.toFixed(3)}.`;
}

/**
 * Whether a live runs update concerns the group: a run of it that is new or whose windows, status or last
 * step changed since `seen` (which is updated). The view then asks for the report again.
 */
export function groupTouched(seen: Map<string, string>, group: string, runs: readonly RunSummary[]): boolean {
  let touched = false;
  for (const r of runs) {
    if (r.group !== group) continue;
    const sig = `${r.windows}|${r.status}|${r.last_step ?? ''}`;
    if (seen.get(r.id) !== sig) touched = true;
    seen.set(r.id, sig);
  }
  return touched;
}

/** Where a place on the group's axis is, in words: "step 1,200" or "epoch 3.4". */
export function placeText(align: GroupAlign, v: number): string {
  return align === 'epoch' ? `epoch ${v.toFixed(v < 10 ? 2 : 1)}` : `step ${Math.round(v).toLocaleString('en')}`;
}
