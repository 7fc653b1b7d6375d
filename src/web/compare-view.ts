/**
 * The compare view: 2 to 6 runs overlaid on the same charts, aligned by step (the network's phase, gradient
 * SNR, weight travel, loss and noise scale), with one line of facts per run. One colour per run, in the
 * order of the URL; the runs list links back to each run's own view.
 */
import type uPlot from 'uplot';
import type { WindowRecord } from '../protocol/records.js';
import type { Live } from './connection.js';
import { el, scrollBox, type View } from './dom.js';
import {
  CAUTION,
  COMPARE_MAX,
  COMPARE_MIN,
  NETWORK_LABEL,
  compareLabels,
  currentPhase,
  formatNumber,
  latestAdvice,
  overlayColumns,
  phaseRows,
  positive,
  runHash,
  travelColumns,
  type StepRange,
} from './model.js';
import { layerStyle } from './palette.js';
import { LineChart, drawPhaseStrip, fewPoints, stepChart, stripAxisOf, zeroDbLine } from './charts.js';
import { RunFeed } from './run-feed.js';
import { refusal } from './run-view.js';
import { viewZoom } from './view-zoom.js';


export function compareView(root: HTMLElement, live: Live, ids: readonly string[], initial: StepRange | null = null): View {
  const back = el('a', { href: `${location.pathname}${location.search}#/` }, '← all runs');
  if (ids.length < COMPARE_MIN || ids.length > COMPARE_MAX) {
    root.append(
      el(
        'section',
        { class: 'compare' },
        back,
        el('h2', {}, 'Nothing to compare'),
        el('p', { class: 'error', 'data-testid': 'compare-error' }, `The compare view overlays ${COMPARE_MIN} to ${COMPARE_MAX} runs; this link names ${ids.length}. Pick the runs from the list.`),
      ),
    );
    return { dispose() {} };
  }
  const title = el('h2', { 'data-testid': 'compare-title' }, `Comparing ${ids.length} runs`);
  document.title = `Comparing ${ids.length} runs — tidemark`;
  const factsBody = el('tbody');
  const factsTable = el(
    'table',
    { class: 'compare-runs', 'data-testid': 'compare-runs' },
    el('thead', {}, el('tr', {}, ...['', 'Run', 'Status', 'Last step', 'Network phase now', 'Travel exponent', 'Stop advice'].map((h) => el('th', {}, h)))),
    factsBody,
  );
  const errors = el('div', { 'data-testid': 'compare-errors' });
  const stripBox = el('div', { class: 'strip', 'data-testid': 'compare-strip' });
  const snrBox = el('div', { class: 'chart', 'data-testid': 'compare-snr' });
  const travelBox = el('div', { class: 'chart', 'data-testid': 'compare-travel' });
  const lossBox = el('div', { class: 'chart small', 'data-testid': 'compare-loss' });
  const noiseBox = el('div', { class: 'chart small', 'data-testid': 'compare-noise' });

  const feeds: RunFeed[] = [];
  const { zoom, controls, fetchDetail } = viewZoom(initial, () => feeds);

  root.append(
    el(
      'section',
      { class: 'compare' },
      back,
      title,
      el('p', { class: 'note' }, 'Each run in its own colour, aligned by step. The network as a whole is shown for each run; open a run for its layers.'),
      scrollBox(factsTable),
      errors,
      el('p', { class: 'caution' }, CAUTION),
      ...controls,
      el('h3', {}, 'Network phase per run (estimated)'),
      stripBox,
      el('h3', {}, 'Gradient SNR (dB), network'),
      snrBox,
      el('p', { class: 'note' }, 'Thin dotted lines: each run’s noise floor, where pure noise would read (it depends on the window length).'),
      el('h3', {}, 'Weight travel, network'),
      travelBox,
      el('h3', {}, 'Loss'),
      lossBox,
      el('p', { class: 'note' }, 'Solid: training loss (window mean); dots on a dashed line: validation loss where an epoch ended.'),
      el('h3', {}, 'Gradient noise scale B_noise, network (estimate)'),
      noiseBox,
    ),
  );

  const snr = new LineChart(snrBox, 340, zoom);
  const travel = new LineChart(travelBox, 320, zoom);
  const loss = new LineChart(lossBox, 260, zoom);
  const noise = new LineChart(noiseBox, 260, zoom);
  const charts = [snr, travel, loss, noise];

  const names = (): string[] => compareLabels(feeds.map((f) => ({ id: f.info?.id ?? f.id, name: f.info?.name ?? f.id, tags: f.info?.tags ?? {} })));
  const windowsOf = (): WindowRecord[][] => feeds.map((f) => f.windows);
  const runSeries = (label: string, i: number, extra: Partial<uPlot.Series> = {}): uPlot.Series => {
    const s = layerStyle(i);
    return { label, stroke: s.stroke, width: 2, points: { show: fewPoints }, ...extra };
  };

  const drawFacts = (): void => {
    factsBody.replaceChildren(
      ...feeds.map((f, i) => {
        const s = layerStyle(i);
        const info = f.info;
        const step = f.lastStep();
        const rows = info === null || step === null ? null : phaseRows([], f.markers, Math.max(1, f.windows[0]?.step ?? 1), step);
        const travelCols = info === null ? null : travelColumns([], f.windows);
        const exponent = travelCols?.exponents[0] ?? null;
        const adv = latestAdvice(f.markers);
        return el(
          'tr',
          { 'data-run': info?.id ?? f.id },
          el('td', {}, el('span', { class: 'swatch', style: `background:${s.stroke}`, 'aria-hidden': 'true' })),
          el('td', {}, el('a', { href: `${location.pathname}${location.search}${runHash(info?.id ?? f.id)}` }, names()[i] ?? f.id)),
          el('td', { class: `status ${info?.status ?? ''}` }, info?.status ?? (f.failed ? 'not available' : 'loading…')),
          el('td', { class: 'num' }, step === null ? '–' : String(step)),
          el('td', {}, rows === null ? '–' : currentPhase(rows[0]!)),
          el('td', { class: 'num' }, exponent === null ? '–' : formatNumber(exponent)),
          el('td', {}, adv.step === null ? 'keep training (no stop advice so far)' : `${adv.verdict} since step ${adv.step}`),
        );
      }),
    );
  };

  const drawStrip = (u: uPlot): void => {
    const axis = stripAxisOf(u);
    if (axis === null) return;
    const labels = names();
    const rows = feeds.map((f, i) => ({ ...phaseRows([], f.markers, axis.min, axis.max)[0]!, label: labels[i] ?? NETWORK_LABEL }));
    drawPhaseStrip(stripBox, rows, axis);
  };

  const drawCharts = (): void => {
    const ws = windowsOf();
    if (ws.every((w) => w.length === 0)) return;
    const n = names();
    const key = n.join('\u0000');
    const snrCols = overlayColumns(ws, (w) => w.network.grad_snr_db);
    const floorCols = overlayColumns(ws, (w) => 20 * Math.log10(w.snr_floor));
    // Both overlays cover the same windows, so their step columns agree.
    snr.update([snrCols.steps, ...snrCols.series, ...floorCols.series], () => ({
      ...stepChart('gradient SNR (dB)'),
      series: [
        { label: 'step' },
        ...n.map((name, i) => runSeries(name, i)),
        ...n.map((name, i) => runSeries(`${name} noise floor`, i, { width: 1, dash: [1, 4] })),
      ],
      hooks: { draw: [drawStrip, zeroDbLine] },
    }), key);
    // One line per run of a positive network value, on log axes.
    const overlayLog = (chart: LineChart, value: (w: WindowRecord) => number | null | undefined, yLabel: string, axisWidth: number): void => {
      const cols = overlayColumns(ws, (w) => positive(value(w)));
      chart.update([cols.steps, ...cols.series], () => ({ ...stepChart(yLabel, axisWidth), series: [{ label: 'step' }, ...n.map((name, i) => runSeries(name, i))] }), key);
    };
    overlayLog(travel, (w) => w.network.weight_travel, 'weight travel ‖w − w₀‖ (log scale)', 70);
    const lossCols = overlayColumns(ws, (w) => w.logs.loss);
    const valCols = overlayColumns(ws, (w) => w.logs.val_loss);
    // val_loss exists at epoch ends only: its missing values are joined, not gaps.
    const valSeries = valCols.series.map((s) => s.map((v) => (v === null ? undefined : v)));
    loss.update([lossCols.steps, ...lossCols.series, ...valSeries], () => ({
      ...stepChart('loss'),
      series: [
        { label: 'step' },
        ...n.map((name, i) => runSeries(`${name} loss`, i)),
        ...n.map((name, i) => runSeries(`${name} val_loss`, i, { width: 1.5, dash: [6, 3], points: { show: true, size: 6, fill: layerStyle(i).stroke } })),
      ],
    }), key);
    overlayLog(noise, (w) => w.network.noise_scale, 'examples (log scale)', 60);
  };

  // Drawn once per animation frame, however many runs' windows arrived in it.
  let frame: number | null = null;
  const draw = (): void => {
    frame ??= requestAnimationFrame(() => {
      frame = null;
      drawFacts();
      drawCharts();
    });
  };
  ids.forEach((id) => {
    const feed: RunFeed = new RunFeed(
      live,
      id,
      ids.length,
      (change) => {
        if (change === 'backfill') fetchDetail([feed]);
        draw();
      },
      (code, message) => {
        errors.append(el('p', { class: 'error', 'data-testid': 'run-error' }, refusal(id, code, message)));
        drawFacts();
      },
    );
    feeds.push(feed);
  });
  drawFacts();

  const onResize = (): void => {
    for (const c of charts) c.resize();
  };
  window.addEventListener('resize', onResize);
  return {
    dispose() {
      if (frame !== null) cancelAnimationFrame(frame);
      for (const f of feeds) f.dispose();
      window.removeEventListener('resize', onResize);
      for (const c of charts) c.destroy();
    },
  };
}

