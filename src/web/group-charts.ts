/**
 * The group view's drawings, in SVG (a handful of grid points per band and one dot per run, so each mark
 * can carry its own title): the spread of a quantity across runs against step or epoch, each layer's
 * transition across runs as a strip of dots, and a sweep on log-log axes with its fitted power law.
 */
import { svg } from './dom.js';
import { formatNumber, stripTicks } from './model.js';
import type { BandPath, GroupAlign, GroupReport, SweepReport } from './group-model.js';
import { placeText, sweepLine } from './group-model.js';
import { NETWORK_STYLE, OKABE_ITO, REFERENCE_GREY, layerStyle } from './palette.js';

interface Frame {
  width: number;
  height: number;
  m: { left: number; right: number; top: number; bottom: number };
}

const plotWidth = (f: Frame): number => f.width - f.m.left - f.m.right;
const plotHeight = (f: Frame): number => f.height - f.m.top - f.m.bottom;

/** A map from values to pixels along one axis, linear or logarithmic. */
function scale(lo: number, hi: number, p0: number, p1: number, log: boolean): (v: number) => number {
  const t = log ? Math.log10 : (v: number) => v;
  const a = t(lo);
  const span = t(hi) - a || 1;
  return (v) => p0 + ((p1 - p0) * (t(v) - a)) / span;
}

/** Linear ticks at 1, 2, 2.5 or 5 × a power of ten, about `count` of them. */
function linearTicks(lo: number, hi: number, count = 5): number[] {
  if (!(hi > lo)) return [lo];
  const raw = (hi - lo) / count;
  const mag = 10 ** Math.floor(Math.log10(raw));
  const step = [1, 2, 2.5, 5, 10].map((k) => k * mag).find((s) => s >= raw) ?? raw;
  const out: number[] = [];
  for (let v = Math.ceil(lo / step) * step; v <= hi + step * 1e-9; v += step) out.push(Number(v.toPrecision(6)));
  return out;
}

/** Log-axis ticks; when the range spans less than one 1-2-5 step, its two ends. */
function logTicks(lo: number, hi: number, pixels: number): number[] {
  const t = stripTicks(lo, hi, pixels);
  return t.length >= 2 ? t : [lo, hi];
}

/** Axes, grid lines and titles of a plot. */
function axes(f: Frame, x: { lo: number; hi: number; log: boolean; title: string; ticks?: readonly number[] }, y: { lo: number; hi: number; log: boolean; title: string }): { g: SVGGElement; X: (v: number) => number; Y: (v: number) => number } {
  const pw = plotWidth(f);
  const ph = plotHeight(f);
  const X = scale(x.lo, x.hi, f.m.left, f.m.left + pw, x.log);
  const Y = scale(y.lo, y.hi, f.m.top + ph, f.m.top, y.log);
  const g = svg('g', { class: 'axes', 'font-size': 11, fill: '#333' });
  g.append(svg('rect', { x: f.m.left, y: f.m.top, width: pw, height: ph, fill: 'none', stroke: '#bbb' }));
  for (const t of x.ticks ?? (x.log ? logTicks(x.lo, x.hi, pw) : linearTicks(x.lo, x.hi))) {
    g.append(svg('line', { x1: X(t), x2: X(t), y1: f.m.top, y2: f.m.top + ph, stroke: '#eee' }), svg('text', { x: X(t), y: f.m.top + ph + 14, 'text-anchor': 'middle' }, formatNumber(t)));
  }
  for (const t of y.log ? logTicks(y.lo, y.hi, ph) : linearTicks(y.lo, y.hi)) {
    g.append(svg('line', { x1: f.m.left, x2: f.m.left + pw, y1: Y(t), y2: Y(t), stroke: '#eee' }), svg('text', { x: f.m.left - 6, y: Y(t) + 4, 'text-anchor': 'end' }, formatNumber(t)));
  }
  g.append(
    svg('text', { x: f.m.left + pw / 2, y: f.height - 6, 'text-anchor': 'middle' }, x.title),
    svg('text', { x: 13, y: f.m.top + ph / 2, 'text-anchor': 'middle', transform: `rotate(-90 13 ${f.m.top + ph / 2})` }, y.title),
  );
  return { g, X, Y };
}

const axisWord = (align: GroupAlign): string => (align === 'epoch' ? 'epoch (log scale)' : 'step (log scale)');

/** A closed outline between an upper and a lower line. */
function areaPath(xs: readonly number[], upper: readonly number[], lower: readonly number[], X: (v: number) => number, Y: (v: number) => number): string {
  const top = xs.map((x, i) => `${X(x).toFixed(1)},${Y(upper[i]!).toFixed(1)}`);
  const bottom = xs.map((x, i) => `${X(x).toFixed(1)},${Y(lower[i]!).toFixed(1)}`).reverse();
  return `M${top.join('L')}L${bottom.join('L')}Z`;
}

/**
 * The spread across runs: the lightest area from the lowest run to the highest, a darker one between the
 * quartiles, the median as a line with a dot at each grid point (its title says how many runs it rests on).
 */
export function drawBandChart(box: HTMLElement, band: BandPath, o: { align: GroupAlign; yTitle: string; log: boolean; width: number; colour: string; zeroLine?: boolean }): void {
  const f: Frame = { width: o.width, height: 280, m: { left: 64, right: 14, top: 10, bottom: 40 } };
  if (band.x.length === 0) {
    box.replaceChildren(svg('svg', { width: o.width, height: 40, role: 'img', 'aria-label': 'No values yet' }, svg('text', { x: 8, y: 24, fill: '#555', 'font-size': 13 }, 'No run has a value here yet.')));
    box.dataset.points = '0';
    return;
  }
  const xlo = band.x[0]!;
  const xhi = band.x[band.x.length - 1]!;
  let ylo = Math.min(...band.min);
  let yhi = Math.max(...band.max);
  if (o.zeroLine === true) {
    ylo = Math.min(ylo, 0);
    yhi = Math.max(yhi, 0);
  }
  if (!(yhi > ylo)) [ylo, yhi] = o.log ? [ylo / 2, yhi * 2] : [ylo - 1, yhi + 1];
  if (!o.log) {
    const d = (yhi - ylo) * 0.05;
    ylo -= d;
    yhi += d;
  }
  const { g, X, Y } = axes(f, { lo: xhi > xlo ? xlo : xlo / 2, hi: xhi > xlo ? xhi : xhi * 2, log: true, title: axisWord(o.align) }, { lo: ylo, hi: yhi, log: o.log, title: o.yTitle });
  const root = svg('svg', { width: f.width, height: f.height, viewBox: `0 0 ${f.width} ${f.height}`, role: 'img', 'aria-label': `${o.yTitle} across runs: median, quartiles and range` });
  root.append(g);
  if (o.zeroLine === true) {
    root.append(
      svg('line', { x1: f.m.left, x2: f.width - f.m.right, y1: Y(0), y2: Y(0), stroke: REFERENCE_GREY, 'stroke-width': 1.5 }),
      svg('text', { x: f.width - f.m.right - 4, y: Y(0) - 4, 'text-anchor': 'end', 'font-size': 11, fill: REFERENCE_GREY }, '0 dB'),
    );
  }
  root.append(
    svg('path', { class: 'band-range', 'data-testid': 'band-range', d: areaPath(band.x, band.max, band.min, X, Y), fill: o.colour, 'fill-opacity': 0.13, stroke: 'none' }),
    svg('path', { class: 'band-quartiles', 'data-testid': 'band-quartiles', d: areaPath(band.x, band.q3, band.q1, X, Y), fill: o.colour, 'fill-opacity': 0.33, stroke: 'none' }),
    svg('polyline', { class: 'band-median', 'data-testid': 'band-median', points: band.x.map((x, i) => `${X(x).toFixed(1)},${Y(band.median[i]!).toFixed(1)}`).join(' '), fill: 'none', stroke: o.colour, 'stroke-width': 2 }),
  );
  band.x.forEach((x, i) => {
    root.append(
      svg(
        'circle',
        { class: 'band-point', cx: X(x), cy: Y(band.median[i]!), r: 2.5, fill: o.colour },
        svg('title', {}, `${placeText(o.align, x)}: median ${formatNumber(band.median[i]!)}, quartiles ${formatNumber(band.q1[i]!)} to ${formatNumber(band.q3[i]!)}, range ${formatNumber(band.min[i]!)} to ${formatNumber(band.max[i]!)} over ${band.n[i]} run${band.n[i] === 1 ? '' : 's'}`),
      ),
    );
  });
  box.dataset.points = String(band.x.length);
  box.dataset.runs = String(Math.max(...band.n));
  box.replaceChildren(root);
}

/**
 * Each layer's transition across runs: a row per layer (network on top), a dot per run that reached it,
 * the median as a bar and its bootstrap 95 % interval as a line under the dots, on the group's log axis.
 */
export function drawTransitionStrip(box: HTMLElement, report: GroupReport, runLabels: readonly string[], width: number): void {
  const all = report.layers.flatMap((l) => l.transitions.filter((t): t is number => t !== null && t > 0));
  const rowH = 26;
  const f: Frame = { width, height: 40 + rowH * report.layers.length, m: { left: 150, right: 14, top: 8, bottom: 32 } };
  if (all.length === 0) {
    box.replaceChildren(svg('svg', { width, height: 40, role: 'img', 'aria-label': 'No transitions yet' }, svg('text', { x: 8, y: 24, fill: '#555', 'font-size': 13 }, 'No run has begun to diffuse yet.')));
    return;
  }
  // The dots' own range with a margin: the grid starts at step 1, where no transition is.
  const lo = Math.min(...all) / 1.25;
  const hi = Math.max(...all) * 1.25;
  const pw = plotWidth(f);
  const X = scale(hi > lo ? lo : lo / 2, hi > lo ? hi : hi * 2, f.m.left, f.m.left + pw, true);
  const root = svg('svg', { width, height: f.height, viewBox: `0 0 ${width} ${f.height}`, role: 'img', 'aria-label': 'Where each layer began to diffuse, one dot per run' });
  const g = svg('g', { 'font-size': 11, fill: '#333' });
  const bottom = f.m.top + rowH * report.layers.length;
  for (const t of logTicks(hi > lo ? lo : lo / 2, hi > lo ? hi : hi * 2, pw)) {
    g.append(svg('line', { x1: X(t), x2: X(t), y1: f.m.top, y2: bottom, stroke: '#eee' }), svg('text', { x: X(t), y: bottom + 14, 'text-anchor': 'middle' }, formatNumber(t)));
  }
  g.append(svg('text', { x: f.m.left + pw / 2, y: f.height - 4, 'text-anchor': 'middle' }, `diffusion began, ${axisWord(report.align)}`));
  root.append(g);
  report.layers.forEach((l, i) => {
    const y = f.m.top + rowH * i + rowH / 2;
    const colour = l.position === null ? NETWORK_STYLE.stroke : layerStyle(l.position).stroke;
    const row = svg('g', { class: 'transition-row', 'data-layer': l.layer });
    row.append(svg('text', { x: f.m.left - 8, y: y + 4, 'text-anchor': 'end', 'font-size': 12, fill: '#1a1a1a' }, l.layer));
    row.append(svg('line', { x1: f.m.left, x2: f.m.left + pw, y1: y, y2: y, stroke: '#f0f0f0' }));
    if (l.transition !== null) {
      const t = l.transition;
      row.append(
        svg('line', { class: 'transition-interval', x1: X(t.low), x2: X(t.high), y1: y + 7, y2: y + 7, stroke: colour, 'stroke-width': 2 }, svg('title', {}, `bootstrap 95 % interval of the median: ${placeText(report.align, t.low)} to ${placeText(report.align, t.high)}`)),
        svg('rect', { class: 'transition-median', x: X(t.median) - 1.5, y: y - 10, width: 3, height: 20, fill: colour }, svg('title', {}, `median over ${t.n} runs: ${placeText(report.align, t.median)}`)),
      );
    }
    l.transitions.forEach((s, k) => {
      if (s === null || !(s > 0)) return;
      row.append(
        svg('circle', { class: 'transition-dot', cx: X(s), cy: y, r: 4, fill: '#ffffff', stroke: colour, 'stroke-width': 1.8 }, svg('title', {}, `${runLabels[k] ?? report.runs[k]!.id}: ${placeText(report.align, s)}`)),
      );
    });
    root.append(row);
  });
  box.replaceChildren(root);
}

/**
 * A sweep on log-log axes: one dot per run, the fitted power law as a line over the runs' range, and below
 * it the residuals (ln y − fitted) against the same x.
 */
export function drawSweep(box: HTMLElement, w: SweepReport, yTitle: string, width: number): void {
  if (w.points.length === 0) {
    box.replaceChildren();
    return;
  }
  const xs = w.points.map((p) => p.x);
  const ys = w.points.map((p) => p.y);
  const line = sweepLine(w);
  const xlo = Math.min(...xs);
  const xhi = Math.max(...xs);
  const ylo = Math.min(...ys, ...line.map((p) => p.y));
  const yhi = Math.max(...ys, ...line.map((p) => p.y));
  const f: Frame = { width, height: 300, m: { left: 70, right: 14, top: 10, bottom: 40 } };
  const xr = xhi > xlo ? [xlo / 1.1, xhi * 1.1] : [xlo / 2, xhi * 2];
  // A sweep sets a few values of its tag (depth 1, 2, 4): label those rather than a 1-2-5 ladder that may miss them.
  const distinct = [...new Set(xs)].sort((a, b) => a - b);
  const xTicks = distinct.length <= 12 ? distinct : undefined;
  const yr = yhi > ylo ? [ylo / 1.2, yhi * 1.2] : [ylo / 2, yhi * 2];
  const { g, X, Y } = axes(f, { lo: xr[0]!, hi: xr[1]!, log: true, title: `${w.tag} (log scale)`, ticks: xTicks }, { lo: yr[0]!, hi: yr[1]!, log: true, title: yTitle });
  const root = svg('svg', { width, height: f.height, viewBox: `0 0 ${width} ${f.height}`, role: 'img', 'aria-label': `${yTitle} against ${w.tag}, log-log, with the fitted power law` });
  root.append(g);
  if (line.length === 2) {
    root.append(
      svg('line', { class: 'sweep-fit', 'data-testid': 'sweep-fit', x1: X(line[0]!.x), y1: Y(line[0]!.y), x2: X(line[1]!.x), y2: Y(line[1]!.y), stroke: OKABE_ITO.vermillion, 'stroke-width': 2 }, svg('title', {}, 'least-squares fit on log-log axes')),
    );
  }
  for (const p of w.points) {
    root.append(svg('circle', { class: 'sweep-point', cx: X(p.x), cy: Y(p.y), r: 4.5, fill: OKABE_ITO.blue, 'fill-opacity': 0.75, stroke: '#ffffff' }, svg('title', {}, `${w.tag} = ${p.x}: ${formatNumber(p.y)}`)));
  }
  const parts: Node[] = [root];
  if (w.residuals.length > 0) {
    const rf: Frame = { width, height: 130, m: { left: 70, right: 14, top: 8, bottom: 34 } };
    const rmax = Math.max(...w.residuals.map(Math.abs), 1e-3) * 1.2;
    const r = axes(rf, { lo: xr[0]!, hi: xr[1]!, log: true, title: `${w.tag} (log scale)`, ticks: xTicks }, { lo: -rmax, hi: rmax, log: false, title: 'residual, ln' });
    const rs = svg('svg', { width, height: rf.height, viewBox: `0 0 ${width} ${rf.height}`, role: 'img', 'aria-label': 'Residuals of the fit on log axes' });
    rs.append(r.g, svg('line', { x1: rf.m.left, x2: width - rf.m.right, y1: r.Y(0), y2: r.Y(0), stroke: REFERENCE_GREY }));
    w.points.forEach((p, i) => rs.append(svg('circle', { class: 'sweep-residual', cx: r.X(p.x), cy: r.Y(w.residuals[i]!), r: 3.5, fill: OKABE_ITO.blue }, svg('title', {}, `${w.tag} = ${p.x}: ${w.residuals[i]!.toFixed(3)}`))));
    parts.push(rs);
  }
  box.replaceChildren(...parts);
}
