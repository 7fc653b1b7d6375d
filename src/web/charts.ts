/**
 * The run view's drawings beyond the SNR chart: the phase strip and the information plane (SVG, drawn
 * here), and a small holder for the uPlot line charts that redraws in place while the series stay the same.
 */
import uPlot from 'uplot';
import { svg } from './dom.js';
import { formatNumber, NETWORK_LABEL, settingText, stripTicks, tint, type InfoPlane, type InfoTrajectory, type PhaseName, type PhaseRow, type StepRange } from './model.js';
import { NETWORK_STYLE, OKABE_ITO, PHASE_FILL, REFERENCE_GREY, layerStyle } from './palette.js';

export const PHASE_WORDS: Record<PhaseName, string> = {
  drift: 'drift: the mean gradient outweighs its noise, weights move steadily',
  diffusion: 'diffusion: noise dominates, weights wander',
  undetermined: 'undetermined: no phase marker yet',
};

/** The horizontal placement shared with the SNR chart: CSS pixels of its plotting area and its step range. */
export interface StripAxis {
  width: number;
  left: number;
  plotWidth: number;
  min: number;
  max: number;
}

/** The strip's placement under a chart: its step range and plotting area in CSS pixels; null before it has a range. */
export function stripAxisOf(u: uPlot): StripAxis | null {
  const min = u.scales.x?.min;
  const max = u.scales.x?.max;
  if (min === undefined || max === undefined || min === null || max === null || !(min > 0) || !(max > min)) return null;
  const ratio = uPlot.pxRatio;
  return { width: u.width, left: u.bbox.left / ratio, plotWidth: u.bbox.width / ratio, min, max };
}

const ROW = 18;
const GAP = 3;

/** Draws one band per row (network on top) coloured by phase along the log step axis, with marker ticks. */
export function drawPhaseStrip(box: HTMLElement, rows: readonly PhaseRow[], axis: StripAxis): void {
  const lmin = Math.log10(axis.min);
  const span = Math.log10(axis.max) - lmin || 1;
  const x = (s: number): number => axis.left + (axis.plotWidth * (Math.log10(Math.min(Math.max(s, axis.min), axis.max)) - lmin)) / span;
  const inRange = (s: number): boolean => s >= axis.min && s <= axis.max;
  const labels = stripTicks(axis.min, axis.max, axis.plotWidth);
  const rowsHeight = rows.length * (ROW + GAP) + 2;
  const height = rowsHeight + (labels.length > 0 ? AXIS_HEIGHT : 0);
  const root = svg('svg', { width: axis.width, height, viewBox: `0 0 ${axis.width} ${height}`, role: 'img', 'aria-label': 'Phase of each layer against step' });
  const hatch = svg(
    'pattern',
    { id: 'tm-diffusion-hatch', width: 6, height: 6, patternUnits: 'userSpaceOnUse', patternTransform: 'rotate(45)' },
    svg('rect', { width: 6, height: 6, fill: PHASE_FILL.diffusion }),
    svg('line', { x1: 0, y1: 0, x2: 0, y2: 6, stroke: '#ffffff', 'stroke-width': 2 }),
  );
  root.append(svg('defs', {}, hatch));
  rows.forEach((row, i) => {
    const y = 1 + i * (ROW + GAP);
    const g = svg('g', { class: 'phase-row', 'data-layer': row.label });
    for (const seg of row.segments) {
      // Zoomed in, a segment outside the range is not drawn, and one across its edge is cut there.
      if (seg.to < axis.min || seg.from > axis.max) continue;
      const x0 = x(seg.from);
      const w = Math.max(x(seg.to) - x0, 1);
      const fill = seg.phase === 'diffusion' ? 'url(#tm-diffusion-hatch)' : PHASE_FILL[seg.phase];
      g.append(
        svg(
          'rect',
          { class: `phase-seg ${seg.phase}`, 'data-phase': seg.phase, x: x0, y, width: w, height: ROW, fill },
          svg('title', {}, `${row.label}: ${seg.phase} from step ${formatNumber(seg.from)} to ${formatNumber(seg.to)}`),
        ),
      );
    }
    for (const t of row.ticks) {
      // A marker outside the zoomed range is not drawn (it used to sit on the edge as if it were there).
      if (!inRange(t.step)) continue;
      const tx = x(t.step);
      g.append(
        svg(
          'line',
          { class: 'phase-tick', x1: tx, x2: tx, y1: y - 1, y2: y + ROW + 1, stroke: OKABE_ITO.black, 'stroke-width': 2 },
          svg('title', {}, `${t.kind} at step ${t.step} (confidence ${formatNumber(t.confidence)})`),
        ),
      );
    }
    // The row's name, left of the plotting area where it fits, inside the band otherwise.
    const label = row.label === NETWORK_LABEL ? 'network' : row.label;
    const inside = axis.left < 90;
    g.append(
      svg(
        'text',
        {
          x: inside ? axis.left + 4 : axis.left - 6,
          y: y + ROW - 5,
          'text-anchor': inside ? 'start' : 'end',
          'font-size': 11,
          'font-weight': row.label === NETWORK_LABEL ? 700 : 400,
          // Inside the band: white on a dark halo, readable on the dark drift shade and on the pale ones alike.
          fill: inside ? '#ffffff' : '#1a1a1a',
          ...(inside ? { stroke: '#1a1a1a', 'stroke-width': 3, 'paint-order': 'stroke' } : {}),
        },
        label,
      ),
    );
    root.append(g);
  });
  // Step labels under the strip: on a log axis the first few hundred steps take most of the width.
  if (labels.length > 0) {
    const g = svg('g', { class: 'strip-axis', 'data-testid': 'strip-axis' });
    for (const s of labels) {
      const sx = x(s);
      g.append(
        svg('line', { x1: sx, x2: sx, y1: rowsHeight, y2: rowsHeight + 4, stroke: '#555' }),
        svg('text', { x: sx, y: rowsHeight + AXIS_HEIGHT - 2, 'text-anchor': 'middle', 'font-size': 10, fill: '#333' }, formatNumber(s)),
      );
    }
    root.append(g);
  }
  box.replaceChildren(root);
}

const AXIS_HEIGHT = 16;


/** The phase legend: a swatch and the phase in words, plus the tick. */
export function phaseLegend(): HTMLElement {
  const ul = document.createElement('ul');
  ul.className = 'legend';
  ul.dataset.testid = 'phase-legend';
  for (const p of ['drift', 'diffusion', 'undetermined'] as const) {
    const sw = svg('svg', { width: 22, height: 12, 'aria-hidden': 'true' }, svg('rect', { width: 22, height: 12, fill: PHASE_FILL[p], stroke: '#999' }));
    // The same hatching as the strip's diffusion bands, drawn out so the legend stands without the strip.
    if (p === 'diffusion') for (const x0 of [-6, 0, 6, 12, 18]) sw.append(svg('line', { x1: x0, y1: 12, x2: x0 + 12, y2: 0, stroke: '#ffffff', 'stroke-width': 2 }));
    const li = document.createElement('li');
    li.append(sw, ` ${PHASE_WORDS[p]}`);
    ul.append(li);
  }
  const tick = document.createElement('li');
  tick.append(svg('svg', { width: 22, height: 12, 'aria-hidden': 'true' }, svg('line', { x1: 11, x2: 11, y1: 0, y2: 12, stroke: '#000', 'stroke-width': 2 })), ' a drift-start or diffusion-start marker (placed at its estimated step)');
  ul.append(tick);
  return ul;
}


/**
 * One step range for all the charts of a view: zooming one (drag across it) zooms the others, a double
 * click goes back to the whole run, and `changed` hears of it (the run view then fetches the zoomed part in
 * full detail). The user's intent is read from the mouse, not from uPlot's scale events, which also fire
 * for new data and new charts. New data would reset a chart's scales, so it goes in through `setData`.
 */
export class StepZoom {
  range: StepRange | null = null;
  private readonly plots = new Set<uPlot>();
  private dragged: uPlot | null = null;
  private readonly onMouseUp = (): void => {
    const u = this.dragged;
    this.dragged = null;
    // uPlot applies a drag's range in its own mouseup handler; read it once that has run.
    if (u !== null) setTimeout(() => this.fromUser(u), 0);
  };

  constructor(private readonly changed: (range: StepRange | null) => void = () => {}) {}

  add(u: uPlot): void {
    if (this.plots.size === 0) window.addEventListener('mouseup', this.onMouseUp);
    this.plots.add(u);
    u.over.addEventListener('mousedown', () => {
      this.dragged = u;
    });
    u.over.addEventListener('dblclick', () => setTimeout(() => this.fromUser(u), 0));
    if (this.range !== null) u.setScale('x', this.range);
  }

  remove(u: uPlot): void {
    this.plots.delete(u);
    if (this.plots.size === 0) window.removeEventListener('mouseup', this.onMouseUp);
  }

  /** After a drag or a double click on one chart: its step range becomes every chart's. */
  private fromUser(u: uPlot): void {
    const min = u.scales.x?.min;
    const max = u.scales.x?.max;
    if (min === undefined || max === undefined || min === null || max === null) return;
    const xs = u.data[0];
    const whole = xs.length === 0 || (min <= xs[0]! && max >= xs[xs.length - 1]!);
    const next = whole ? null : { min, max };
    // A click without a drag changes nothing.
    if (next === null ? this.range === null : this.range !== null && next.min === this.range.min && next.max === this.range.max) return;
    this.set(next);
  }

  /** Shows this range on every chart (null: each its whole data). */
  set(range: StepRange | null): void {
    this.range = range;
    for (const u of this.plots) this.apply(u);
    this.changed(range);
  }

  setData(u: uPlot, data: uPlot.AlignedData): void {
    u.setData(data);
    if (this.range !== null) u.setScale('x', this.range);
  }

  private apply(u: uPlot): void {
    const xs = u.data[0];
    if (this.range !== null) u.setScale('x', this.range);
    else if (xs.length > 0) u.setScale('x', { min: xs[0]!, max: xs[xs.length - 1]! });
  }
}

/** A uPlot chart in a box: data replaced in place while the number of series holds, rebuilt otherwise. */
export class LineChart {
  plot: uPlot | null = null;
  constructor(
    readonly box: HTMLElement,
    readonly height: number,
    readonly zoom: StepZoom | null = null,
  ) {}

  width(): number {
    return Math.max(280, Math.min(this.box.clientWidth || 900, 1100));
  }

  private key = '';

  /** New data; the chart is rebuilt when the number of series or the `key` (say, their labels) changed. */
  update(data: uPlot.AlignedData, options: () => Omit<uPlot.Options, 'width' | 'height'>, key = ''): void {
    if (this.plot !== null && this.plot.series.length === data.length && key === this.key) {
      if (this.zoom !== null) this.zoom.setData(this.plot, data);
      else this.plot.setData(data);
      return;
    }
    this.destroy();
    this.key = key;
    const opts = options();
    // The shown step range, on the box: what the browser tests read to see every chart follow a zoom.
    const mark = (u: uPlot, key: string): void => {
      if (key !== 'x') return;
      this.box.dataset.steps = `${Math.round(u.scales.x?.min ?? 0)}-${Math.round(u.scales.x?.max ?? 0)}`;
    };
    // The legend shows the latest values while the pointer is elsewhere (uPlot shows "--" then).
    const latest = (u: uPlot): void => {
      if (u.cursor.idx != null) return;
      const n = u.data[0]?.length ?? 0;
      if (n > 0) u.setLegend({ idx: n - 1 });
    };
    opts.hooks = {
      ...opts.hooks,
      setScale: [...(opts.hooks?.setScale ?? []), mark],
      ready: [...(opts.hooks?.ready ?? []), latest],
      setData: [...(opts.hooks?.setData ?? []), latest],
      setCursor: [...(opts.hooks?.setCursor ?? []), latest],
    };
    this.plot = new uPlot({ ...opts, width: this.width(), height: this.height }, data, this.box);
    this.zoom?.add(this.plot);
  }

  resize(): void {
    this.plot?.setSize({ width: this.width(), height: this.height });
  }

  destroy(): void {
    if (this.plot !== null) this.zoom?.remove(this.plot);
    this.plot?.destroy();
    this.plot = null;
  }
}

/** uPlot draw hook: the 0 dB line, where the mean gradient and its noise are of equal size. */
export function zeroDbLine(u: uPlot): void {
  const y = u.valToPos(0, 'y', true);
  if (!Number.isFinite(y) || y < u.bbox.top || y > u.bbox.top + u.bbox.height) return;
  const ctx = u.ctx;
  const px = uPlot.pxRatio;
  ctx.save();
  ctx.strokeStyle = REFERENCE_GREY;
  ctx.lineWidth = 1.5 * px;
  ctx.setLineDash([]);
  ctx.beginPath();
  ctx.moveTo(u.bbox.left, y);
  ctx.lineTo(u.bbox.left + u.bbox.width, y);
  ctx.stroke();
  ctx.fillStyle = REFERENCE_GREY;
  ctx.font = `${11 * px}px sans-serif`;
  ctx.textAlign = 'right';
  ctx.fillText('0 dB', u.bbox.left + u.bbox.width - 4 * px, y - 4 * px);
  ctx.restore();
}

/** Tick labels for any axis (uPlot passes null for the ticks it leaves unlabelled): short, never 9999999e+30. */
export const tickValues = (_u: uPlot, ticks: (number | null)[]): string[] => ticks.map((t) => (t === null ? '' : formatNumber(t)));

/**
 * The step axis, logarithmic. Its range is exactly the data's (or the zoom's): uPlot's default log range
 * widens to whole decades, which left a run of 3,000 steps on an axis to 10,000.
 */
export const xLog: uPlot.Scale = { time: false, distr: 3, range: (_u, min, max) => (min === max ? [min / 2, max * 2] : [min, max]) };

/**
 * Scales and axes of a chart against step (log axis): a linear y axis with this label, or, given the axis
 * width in pixels, a logarithmic one (its label should say so).
 */
export function stepChart(yLabel: string, logWidth?: number): Pick<uPlot.Options, 'scales' | 'axes'> {
  return {
    scales: { x: xLog, y: logWidth === undefined ? { auto: true } : { distr: 3 } },
    axes: [{ label: 'step (log scale)', values: tickValues }, logWidth === undefined ? { label: yLabel, values: tickValues, size: 60 } : { label: yLabel, values: tickValues, size: logWidth }],
  };
}

/**
 * Dots on a line only while few windows are in view: they show where the measurements are, and past that
 * they cost more drawing time than they tell (50 layers × 200 windows is 10,000 dots per chart).
 */
export const fewPoints = (_u: uPlot, _series: number, i0: number, i1: number): boolean => i1 - i0 < 40;

/** The uPlot series of a layer (by index) or of the network. */
export function lineSeries(label: string, i: number): uPlot.Series {
  if (label === NETWORK_LABEL) return { label, stroke: NETWORK_STYLE.stroke, width: NETWORK_STYLE.width, spanGaps: false, points: { show: fewPoints } };
  const s = layerStyle(i);
  return { label, stroke: s.stroke, dash: s.dash, width: 1.5, spanGaps: false, points: { show: fewPoints } };
}

function niceTicks(max: number, count = 5): number[] {
  if (!(max > 0)) return [0];
  const raw = max / count;
  const mag = 10 ** Math.floor(Math.log10(raw));
  const step = [1, 2, 2.5, 5, 10].map((k) => k * mag).find((s) => s >= raw) ?? raw;
  const out: number[] = [];
  for (let v = 0; v <= max + 1e-9; v += step) out.push(Number(v.toPrecision(6)));
  return out;
}

/**
 * The information plane: I(X;T) across, I(T;Y) up, each layer's probe windows as one path in step order.
 * A marker's size and shade grow with its step (small and pale early, large and full late), the first
 * window is a square and the last a triangle. Windows whose estimate is saturated are hollow grey markers
 * joined by dotted grey lines: they are not measurements. Dashed grey lines mark the estimate's cap, log2 of
 * the rows, and log2 of the classes, the most I(T;Y) can be.
 */
export function drawInfoPlane(box: HTMLElement, plane: InfoPlane, width: number): void {
  const height = 380;
  const m = { left: 62, right: 16, top: 12, bottom: 46 };
  const pw = width - m.left - m.right;
  const ph = height - m.top - m.bottom;
  const all = plane.trajectories.flatMap((t) => t.points);
  const xCap = plane.rows !== null && plane.rows > 1 ? Math.log2(plane.rows) : null;
  const xmax = Math.max(...all.map((p) => p.x), xCap ?? 0, 1e-9) * 1.05;
  const ymax = Math.max(...all.map((p) => p.y), plane.labelCeiling ?? 0, 1e-9) * 1.05;
  const X = (v: number): number => m.left + (pw * v) / xmax;
  const Y = (v: number): number => m.top + ph - (ph * v) / ymax;
  // Pairwise and linear share the noisy I(X;T) across; they differ in what is up.
  const noisy = plane.estimator !== 'binned';
  const linear = plane.estimator === 'linear';
  const root = svg('svg', {
    width,
    height,
    viewBox: `0 0 ${width} ${height}`,
    role: 'img',
    'data-estimator': plane.estimator,
    'aria-label': `Information plane, ${plane.estimator} estimate: input information against label information, one path per layer over training`,
  });
  const axes = svg('g', { class: 'axes', 'font-size': 11, fill: '#333' });
  axes.append(svg('rect', { x: m.left, y: m.top, width: pw, height: ph, fill: 'none', stroke: '#bbb' }));
  for (const t of niceTicks(xmax)) {
    axes.append(svg('line', { x1: X(t), x2: X(t), y1: m.top, y2: m.top + ph, stroke: '#eee' }), svg('text', { x: X(t), y: m.top + ph + 14, 'text-anchor': 'middle' }, formatNumber(t)));
  }
  for (const t of niceTicks(ymax)) {
    axes.append(svg('line', { x1: m.left, x2: m.left + pw, y1: Y(t), y2: Y(t), stroke: '#eee' }), svg('text', { x: m.left - 6, y: Y(t) + 4, 'text-anchor': 'end' }, formatNumber(t)));
  }
  axes.append(
    // The long title needs about 460 px; a phone gets the short one instead of a cut one.
    svg(
      'text',
      { x: m.left + pw / 2, y: height - 8, 'text-anchor': 'middle', 'data-testid': 'plane-x-title' },
      pw >= 460 ? `I(X;T), bits: what the layer keeps about the input (${noisy ? 'pairwise, noise added' : 'binned estimate'})` : 'I(X;T), bits: about the input',
    ),
    svg(
      'text',
      { x: 14, y: m.top + ph / 2, 'text-anchor': 'middle', transform: `rotate(-90 14 ${m.top + ph / 2})`, 'data-testid': 'plane-y-title' },
      linear ? 'I(T;Y) ≥, bits: linear read-out' : 'I(T;Y), bits: about the label',
    ),
  );
  root.append(axes);
  // The caps, where they are known: nothing the estimate reads can lie past them.
  const caps = svg('g', { class: 'info-caps', 'font-size': 10, fill: REFERENCE_GREY });
  if (xCap !== null) {
    caps.append(
      svg('line', { class: 'info-cap', 'data-cap': 'rows', x1: X(xCap), x2: X(xCap), y1: m.top, y2: m.top + ph, stroke: REFERENCE_GREY, 'stroke-dasharray': '5 4' }, svg('title', {}, `log2 ${plane.rows} = ${formatNumber(xCap)} bits: the most the estimate can read over ${plane.rows} probe rows`)),
      // Labelled at the foot: saturated windows sit at the top of this line, and would cover a label there.
      svg('text', { x: X(xCap) - 4, y: m.top + ph - 6, 'text-anchor': 'end' }, `log2 ${plane.rows}`),
    );
  }
  if (plane.labelCeiling !== null) {
    const y = Y(plane.labelCeiling);
    caps.append(
      svg('line', { class: 'info-cap', 'data-cap': 'classes', x1: m.left, x2: m.left + pw, y1: y, y2: y, stroke: REFERENCE_GREY, 'stroke-dasharray': '5 4' }, svg('title', {}, `log2 of the classes = ${formatNumber(plane.labelCeiling)} bits: the most I(T;Y) can be`)),
      svg('text', { x: m.left + 4, y: y - 4 }, 'log2 classes'),
    );
  }
  root.append(caps);
  for (const t of plane.trajectories) root.append(layerPath(t, X, Y, plane.estimator));
  box.replaceChildren(root);
}

/** One layer's path: its segments (saturated ones grey and dotted), then a marker per probe window. */
function layerPath(t: InfoTrajectory, X: (v: number) => number, Y: (v: number) => number, estimator: InfoPlane['estimator']): SVGGElement {
  const style = layerStyle(t.index);
  const g = svg('g', { class: 'info-layer', 'data-layer': t.label });
  // One path per layer for the measured segments, one for those touching a saturated window.
  let measured = '';
  let saturated = '';
  for (let i = 1; i < t.points.length; i++) {
    const a = t.points[i - 1]!;
    const b = t.points[i]!;
    const seg = `M${X(a.x).toFixed(1)} ${Y(a.y).toFixed(1)}L${X(b.x).toFixed(1)} ${Y(b.y).toFixed(1)}`;
    if (a.saturated || b.saturated) saturated += seg;
    else measured += seg;
  }
  if (measured !== '') {
    g.append(svg('path', { class: 'info-path', 'data-layer': t.label, d: measured, fill: 'none', stroke: style.stroke, 'stroke-width': 1.5, 'stroke-dasharray': style.dash.join(' '), 'stroke-linejoin': 'round' }));
  }
  if (saturated !== '') {
    g.append(svg('path', { class: 'info-path saturated', 'data-layer': t.label, d: saturated, fill: 'none', stroke: REFERENCE_GREY, 'stroke-width': 1, 'stroke-dasharray': '2 3' }));
  }
  const last = t.points.length - 1;
  t.points.forEach((p, i) => {
    const role = i === last ? (i === 0 ? 'start and end' : 'end') : i === 0 ? 'start' : '';
    const cx = X(p.x);
    const cy = Y(p.y);
    // Size and shade follow the step: pale and small early, full colour and large late.
    const r = 2.5 + 3.5 * p.age;
    const paint = p.saturated ? { fill: '#ffffff', stroke: REFERENCE_GREY, 'stroke-width': 1.5 } : { fill: tint(style.stroke, 0.75 * (1 - p.age)), stroke: style.stroke, 'stroke-width': 1.25 };
    const cls = ['info-point', i === 0 ? 'info-start' : '', i === last ? 'info-end' : '', p.saturated ? 'saturated' : ''].filter((c) => c !== '').join(' ');
    const data = { class: cls, 'data-step': p.step, 'data-x': p.x, 'data-y': p.y, ...paint };
    const label = estimator === 'linear' ? `I(T;Y) ≥ ${formatNumber(p.y)} bits (linear read-out)` : `I(T;Y) ${formatNumber(p.y)} bits`;
    const values =
      estimator === 'binned'
        ? `I(X;T) ${formatNumber(p.x)} bits, ${label}`
        : `I(X;T) ${formatNumber(p.x)} bits${p.lower === null ? '' : ` (lower bound ${formatNumber(p.lower)})`}, ${label}${p.noiseVariance === null ? '' : `, σ² ${settingText(p.noiseVariance)}`}`;
    const title = svg('title', {}, `${t.label}${role === '' ? '' : ` (${role})`} at step ${p.step}: ${values}${p.saturated ? ' (saturated: says nothing)' : ''}`);
    if (i === last) {
      // The end: a triangle of about the circle's area, a little larger so the latest window stands out.
      const R = 1.6 * r + 1.5;
      const d = `M${cx.toFixed(1)} ${(cy - R).toFixed(1)}L${(cx + 0.866 * R).toFixed(1)} ${(cy + R / 2).toFixed(1)}L${(cx - 0.866 * R).toFixed(1)} ${(cy + R / 2).toFixed(1)}Z`;
      g.append(svg('path', { ...data, d }, title));
    } else if (i === 0) {
      // The start: a square, never smaller than 8 px across, so the earliest (smallest) marker still reads as one.
      const h = Math.max(0.9 * r + 0.5, 4);
      g.append(svg('rect', { ...data, x: (cx - h).toFixed(1), y: (cy - h).toFixed(1), width: (2 * h).toFixed(1), height: (2 * h).toFixed(1) }, title));
    } else {
      g.append(svg('circle', { ...data, cx, cy, r }, title));
    }
  });
  return g;
}

const LEGEND_INK = '#333333';

/** Legend of the information plane: a list of the layers, then one of what the markers' size, shapes and grey mean. */
export function infoLegend(plane: InfoPlane): HTMLElement {
  const list = (): HTMLUListElement => {
    const ul = document.createElement('ul');
    ul.className = 'legend';
    return ul;
  };
  const item = (ul: HTMLUListElement, icon: SVGSVGElement, text: string): void => {
    const li = document.createElement('li');
    li.append(icon, ` ${text}`);
    ul.append(li);
  };
  const layers = list();
  for (const t of plane.trajectories) {
    const s = layerStyle(t.index);
    item(layers, svg('svg', { width: 26, height: 12, 'aria-hidden': 'true' }, svg('line', { x1: 0, x2: 26, y1: 6, y2: 6, stroke: s.stroke, 'stroke-width': 2, 'stroke-dasharray': s.dash.join(' ') }), svg('circle', { cx: 13, cy: 6, r: 3.5, fill: s.stroke })), t.label);
  }
  const marks = list();
  const grow = svg('svg', { width: 40, height: 14, 'aria-hidden': 'true' });
  [0, 0.5, 1].forEach((age, i) => grow.append(svg('circle', { cx: 6 + 14 * i, cy: 7, r: 2.5 + 3.5 * age, fill: tint(LEGEND_INK, 0.75 * (1 - age)), stroke: LEGEND_INK, 'stroke-width': 1 })));
  item(marks, grow, 'later steps: larger and darker');
  item(marks, svg('svg', { width: 16, height: 14, 'aria-hidden': 'true' }, svg('rect', { x: 3, y: 2, width: 10, height: 10, fill: tint(LEGEND_INK, 0.75), stroke: LEGEND_INK })), 'start (first probe window)');
  item(marks, svg('svg', { width: 18, height: 16, 'aria-hidden': 'true' }, svg('path', { d: 'M9 1L16.8 14.5L1.2 14.5Z', fill: LEGEND_INK, stroke: LEGEND_INK })), 'end (latest probe window)');
  if (plane.rows !== null || plane.labelCeiling !== null) {
    item(marks, svg('svg', { width: 26, height: 12, 'aria-hidden': 'true' }, svg('line', { x1: 0, x2: 26, y1: 6, y2: 6, stroke: REFERENCE_GREY, 'stroke-width': 1, 'stroke-dasharray': '5 4' })), 'the most the estimate can read: log2 of the probe rows across, log2 of the classes up');
  }
  item(
    marks,
    svg('svg', { width: 26, height: 12, 'aria-hidden': 'true' }, svg('circle', { cx: 13, cy: 6, r: 4, fill: '#fff', stroke: REFERENCE_GREY, 'stroke-width': 1.5 })),
    plane.estimator !== 'binned'
      ? 'saturated: says nothing (every probe example stays apart through the added noise, so the estimate is at its ceiling)'
      : 'saturated: says nothing (every probe example had its own bin, so the estimate is at its ceiling)',
  );
  const box = document.createElement('div');
  box.className = 'plane-legend';
  box.append(layers, marks);
  return box;
}

/**
 * The keyboard's way to zoom: two step fields and two buttons, kept in step with the charts' range.
 * Returns the form and a function that writes a new range into the fields.
 */
export function stepRangeForm(zoom: StepZoom): { form: HTMLFormElement; show(range: StepRange | null): void } {
  const field = (label: string, testid: string): HTMLInputElement => {
    const input = document.createElement('input');
    input.type = 'number';
    input.min = '0';
    input.step = 'any';
    input.setAttribute('aria-label', label);
    input.dataset.testid = testid;
    return input;
  };
  const from = field('First step to show', 'range-from');
  const to = field('Last step to show', 'range-to');
  const apply = document.createElement('button');
  apply.type = 'submit';
  apply.textContent = 'Show steps';
  const whole = document.createElement('button');
  whole.type = 'button';
  whole.textContent = 'Whole run';
  whole.dataset.testid = 'range-whole';
  const form = document.createElement('form');
  form.className = 'range';
  form.dataset.testid = 'range-form';
  const hint = document.createElement('span');
  hint.className = 'note';
  hint.textContent = 'or drag across a chart to zoom, double-click to go back';
  form.append('Steps ', from, ' to ', to, ' ', apply, ' ', whole, ' ', hint);
  form.addEventListener('submit', (ev) => {
    ev.preventDefault();
    const a = Number(from.value);
    const b = Number(to.value);
    if (from.value === '' || to.value === '' || !(b > a) || !(a > 0)) {
      from.setCustomValidity(!(a > 0) ? 'A step above 0 (the step axis is logarithmic).' : 'The first step must be below the last.');
      from.reportValidity();
      return;
    }
    from.setCustomValidity('');
    zoom.set({ min: a, max: b });
  });
  whole.addEventListener('click', () => zoom.set(null));
  return {
    form,
    show(range) {
      from.value = range === null ? '' : String(Math.round(range.min));
      to.value = range === null ? '' : String(Math.round(range.max));
    },
  };
}
