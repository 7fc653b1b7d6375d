/**
 * `tidemark group NAME`: the group report (storage/group-report.ts) as text for the terminal.
 */
import type { GroupReport } from '../storage/group-report.js';

const fmt = (x: number): string => (Number.isFinite(x) ? (Math.abs(x) >= 100 ? x.toFixed(0) : x.toFixed(1)) : '—');

/** The report as text for the terminal. */
export function renderGroup(r: GroupReport): string {
  const out: string[] = [];
  out.push(`group ${r.group}: ${r.runs.length} run${r.runs.length === 1 ? '' : 's'}`);
  r.runs.forEach((run, k) => out.push(`  ${run.id.slice(0, 8)}  ${run.name}  ${run.status}, ${run.windows} windows${r.stops[k] !== null ? `, first stop advice at step ${r.stops[k]}` : ''}`));
  if (r.byPosition) out.push('  the runs name their layers differently: layers are compared by position, named as in the first run');
  out.push('', 'Diffusion began (first online diffusion-start marker), per run, and the median with its bootstrap 95 % interval:');
  for (const l of r.layers) {
    const steps = l.transitions.map((t) => (t === null ? '—' : String(t))).join(' ');
    const mid = l.transition === null ? 'too few runs reached it' : `median ${fmt(l.transition.median)} [${fmt(l.transition.low)}, ${fmt(l.transition.high)}] over ${l.transition.n} runs`;
    out.push(`  ${l.layer.padEnd(16)} ${steps.padEnd(Math.max(12, steps.length))}  ${mid}`);
  }
  out.push('', `Gradient SNR (dB) across runs at steps ${r.grid.join(', ')}: median [quartiles]`);
  for (const l of r.layers) {
    out.push(`  ${l.layer.padEnd(16)} ${l.snrDb.map((b) => (b.n === 0 ? '—' : `${fmt(b.median)} [${fmt(b.q1)}, ${fmt(b.q3)}]`)).join('  ')}`);
  }
  out.push('', 'Each run is one draw: the interval says how much the transition moves between seeds, not where it must fall. Estimates from minibatch statistics; confirm any decision on held-out data.');
  return out.join('\n');
}
