/**
 * `tidemark group NAME`: the group report (storage/group-report.ts) as text for the terminal.
 */
import type { Band } from '../analysis/group-bands.js';
import type { GroupReport, SweepReport } from '../storage/group-report.js';

const fmt = (x: number): string => (Number.isFinite(x) ? (Math.abs(x) >= 100 ? x.toFixed(0) : x.toFixed(1)) : '—');

/** "step 120" or "epoch 3.4": a place on the report's axis. */
const place = (r: GroupReport, v: number): string => (r.align === 'epoch' ? `epoch ${v.toFixed(1)}` : `step ${fmt(v)}`);

/** The report as text for the terminal. */
export function renderGroup(r: GroupReport): string {
  const out: string[] = [];
  const unit = r.align === 'epoch' ? 'epoch' : 'step';
  out.push(`group ${r.group}: ${r.runs.length} run${r.runs.length === 1 ? '' : 's'}, aligned by ${unit} (interpolated on log ${unit} between each run's windows)`);
  r.runs.forEach((run, k) => {
    const o = r.outcomes[k]!;
    const facts = [`${run.status}, ${run.windows} windows`];
    if (r.unaligned.includes(run.id)) facts.push('left out: its epoch length is unknown');
    if (o.advice !== null) facts.push(`advice ${o.advice.verdict} at ${place(r, o.advice.at)}`);
    if (o.stop !== null) facts.push(`first stop at ${place(r, o.stop)}`);
    if (o.bestValidation !== null) facts.push(`best ${o.bestValidation.metric} ${o.bestValidation.value.toPrecision(4)} at ${place(r, o.bestValidation.at)}`);
    if (o.lossTarget !== null) facts.push(`loss target reached at ${place(r, o.lossTarget)}`);
    out.push(`  ${run.id.slice(0, 8)}  ${run.name}  ${facts.join(', ')}`);
  });
  if (r.byPosition) out.push('  the runs name their layers differently: layers are compared by position, named as in the first run');
  if (r.leftOut.length > 0) out.push(`  the runs differ in depth: layers are compared by name, and ${r.leftOut.join(', ')} (not in every run) left out`);
  out.push('', `Diffusion began (first online diffusion-start marker, ${unit}), per run, and the median with its bootstrap 95 % interval:`);
  for (const l of r.layers) {
    const steps = l.transitions.map((t) => (t === null ? '—' : fmt(t))).join(' ');
    const mid = l.transition === null ? 'too few runs reached it' : `median ${fmt(l.transition.median)} [${fmt(l.transition.low)}, ${fmt(l.transition.high)}] over ${l.transition.n} runs`;
    out.push(`  ${l.layer.padEnd(16)} ${steps.padEnd(Math.max(12, steps.length))}  ${mid}`);
  }
  const bandRows = (title: string, bands: (l: GroupReport['layers'][number]) => Band[]): void => {
    out.push('', `${title} across runs at ${unit}s ${r.grid.map(fmt).join(', ')}: median [quartiles]`);
    for (const l of r.layers) out.push(`  ${l.layer.padEnd(16)} ${bands(l).map((b) => (b.n === 0 ? '—' : `${fmt(b.median)} [${fmt(b.q1)}, ${fmt(b.q3)}]`)).join('  ')}`);
  };
  bandRows('Gradient SNR (dB)', (l) => l.snrDb);
  bandRows('Noise scale (examples)', (l) => l.noiseScale);
  out.push('  (measured at fixed weights now and then: each run gives its measurements nearest each point on the log axis; — none there)');
  bandRows('Weight travel ‖w − w₀‖', (l) => l.weightTravel);
  out.push('', 'Each run is one draw: the interval says how much the transition moves between seeds, not where it must fall. Estimates from minibatch statistics; confirm any decision on held-out data.');
  return out.join('\n');
}

const SWEEP_Y: Record<SweepReport['outcome'], string> = {
  'diffusion-start': "to the network's diffusion",
  stop: 'to the first stop advice',
  'loss-target': 'to the training-loss target',
  'best-validation': 'best validation value',
};

/** A sweep as text: the fitted law, both intervals of its exponent, and the points with their residuals. */
export function renderSweep(w: SweepReport): string {
  const y = w.outcome === 'best-validation' ? `${SWEEP_Y[w.outcome]} (${w.units})` : `${w.units} ${SWEEP_Y[w.outcome]}`;
  const out: string[] = [`Sweep over ${w.tag}: ${y}, ${w.points.length} run${w.points.length === 1 ? '' : 's'}`];
  if (w.fit === null) out.push('  too few runs with a positive tag and the outcome for a fit (3 needed)');
  else {
    out.push(
      `  ${y} ≈ ${fmt(Math.exp(w.fit.intercept))} · ${w.tag}^${w.fit.slope.toFixed(3)}   (log-log least squares, R² ${w.fit.rSquared.toFixed(3)})`,
      `  exponent 95 % interval: [${w.fit.ci95[0].toFixed(3)}, ${w.fit.ci95[1].toFixed(3)}] Student-t over ${w.fit.n} runs; ` +
        (w.bootstrap === null ? 'no bootstrap' : `[${w.bootstrap.low.toFixed(3)}, ${w.bootstrap.high.toFixed(3)}] bootstrap`),
    );
    w.points.forEach((p, i) => out.push(`    ${p.run.slice(0, 8)}  ${w.tag}=${p.x}  ${w.outcome === 'best-validation' ? w.units : w.units.replace(/s$/, '')} ${fmt(p.y)}  residual ${w.residuals[i]!.toFixed(3)}`));
  }
  for (const l of w.left) out.push(`  left out: ${l.run.slice(0, 8)} (${l.why})`);
  out.push('  Runs are few and seeds vary: read the interval, not only the exponent.');
  return out.join('\n');
}
