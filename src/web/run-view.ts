/**
 * The view of one run: header, stop advice with its caution, a phase strip over the gradient SNR per
 * layer against step, weight travel, loss, noise scale, the information plane when a probe ran, and the
 * markers. All charts share one step range; zooming into a thinned part fetches it in full detail.
 */
import type uPlot from 'uplot';
import type { Live } from './connection.js';
import { el, scrollBox, type View } from './dom.js';
import {
  CAUTION,
  adviceSentence,
  currentPhase,
  detailsText,
  floorEnd,
  formatNumber,
  infoPlane,
  latestAdvice,
  lossColumns,
  levelColumns,
  noiseColumns,
  noiseSentence,
  phaseRows,
  planeOf,
  planeSentence,
  planeSettings,
  PLANE_CAUTION,
  snrColumns,
  travelColumns,
  withPlane,
  type PlaneEstimator,
  type StepRange,
} from './model.js';
import { NETWORK_STYLE, REFERENCE_GREY, VAL_LOSS_STYLE } from './palette.js';
import { LineChart, drawInfoPlane, drawPhaseStrip, infoLegend, lineSeries, phaseLegend, stepChart, stripAxisOf, zeroDbLine } from './charts.js';
import { RunFeed, type FeedChange } from './run-feed.js';
import { viewZoom } from './view-zoom.js';

/** A message for a run the server refused. */
export function refusal(ref: string, code: string, message: string): string {
  return code === 'TIDEMARK_ERR_RUN_NOT_FOUND'
    ? `No run matches “${ref}”. Check the link, or pick a run from the list.`
    : code === 'TIDEMARK_ERR_RUN_AMBIGUOUS'
      ? `“${ref}” matches more than one run; use a longer id.`
      : `The server refused this run: ${message}`;
}

export function runView(root: HTMLElement, live: Live, id: string, initial: StepRange | null = null): View {
  const back = el('a', { href: `${location.pathname}${location.search}#/` }, '← all runs');
  const title = el('h2', { 'data-testid': 'run-name' }, id);
  const facts = el('p', { class: 'facts', 'data-testid': 'run-facts' }, 'Loading…');
  const advice = el('p', { class: 'advice', 'data-testid': 'advice' });
  const caution = el('p', { class: 'caution', 'data-testid': 'caution' }, CAUTION);
  const levelBox = el('div', { class: 'chart', 'data-testid': 'level-chart' });
  const levelNote = el(
    'p',
    { class: 'note' },
    'What the phases follow: per layer and window, how far the weights moved along the mean gradient against how far minibatch noise moved them, ' +
      'K·|mean gradient|² / minibatch noise² (the displacement ratio), in dB against step on a log axis. Above 0 dB the layer drifts, below it diffuses. ' +
      'The same at any batch size when the learning rate scales with it. An estimate from the window\'s minibatches.',
  );
  const chartBox = el('div', { class: 'chart', 'data-testid': 'snr-chart' });
  // Said only once the dashed line has ended, so a reader does not take its end for missing data.
  const floorNote = el('p', { class: 'note', 'data-testid': 'floor-note' });
  floorNote.hidden = true;
  const chartNote = el(
    'p',
    { class: 'note' },
    'The classic statistic: |mean gradient| / gradient spread over the window\'s minibatches, 20·log10, per layer. The gradients come from moving weights, ' +
      'so the spread also holds the gradient\'s change along the path, and the ratio compares the batch with the noise scale: it depends on the batch size. ' +
      'The dashed grey line is where pure noise would read.',
  );
  const markerBody = el('tbody');
  const markersNote = el('p', { class: 'note' });
  const stripBox = el('div', { class: 'strip', 'data-testid': 'phase-strip' });
  const stripNote = el(
    'p',
    { class: 'note' },
    'Phase of the network (top row) and of each layer, on the same step axis as the chart below, from the drift-start and diffusion-start markers. ' +
      'A row is undetermined until its first marker. Phases are estimated after the fact and can be revised.',
  );
  const travelBox = el('div', { class: 'chart', 'data-testid': 'travel-chart' });
  const travelBody = el('tbody');
  const travelTable = el(
    'table',
    { class: 'exponents', 'data-testid': 'travel-exponents' },
    el('thead', {}, el('tr', {}, el('th', {}, 'Layer'), el('th', {}, 'Latest travel exponent'))),
    travelBody,
  );
  const travelNote = el(
    'p',
    { class: 'note', 'data-testid': 'travel-note' },
    'Distance of the weights from where they started, against step, both on log axes. The grey reference lines have slope 1 (steady travel, travel ∝ step) ' +
      'and slope ½ (travel ∝ √step, as a random walk would go), drawn through the network at the middle of the run. ' +
      'The exponent is a local slope estimated from recent windows: an estimate, not a measurement.',
  );
  const lossBox = el('div', { class: 'chart small', 'data-testid': 'loss-chart' });
  const lossNote = el('p', { class: 'note' }, 'Training loss as a mean over each window; validation loss at the windows where an epoch ended.');
  const noiseBox = el('div', { class: 'chart small', 'data-testid': 'noise-chart' });
  const noiseText = el('p', { class: 'advice-note', 'data-testid': 'noise-sentence' });
  const infoSection = el('section', { class: 'info', 'data-testid': 'info-section', hidden: '' });
  const infoBox = el('div', { class: 'plane', 'data-testid': 'info-chart' });
  const infoLegendBox = el('div');
  // The estimator shown: pairwise unless the URL asks for another (`plane=linear`, `plane=binned`, kept like `steps=`).
  let estimator: PlaneEstimator = planeOf(location.hash);
  const choice = (value: PlaneEstimator, text: string): { label: HTMLLabelElement; input: HTMLInputElement } => {
    const input = el('input', { type: 'radio', name: 'plane-estimator', value, 'data-testid': `plane-${value}` });
    input.checked = value === estimator;
    input.addEventListener('change', () => {
      if (!input.checked) return;
      estimator = value;
      const hash = withPlane(location.hash, value);
      if (hash !== location.hash) history.replaceState(null, '', `${location.pathname}${location.search}${hash}`);
      drawInfo();
    });
    return { label: el('label', {}, input, ` ${text}`), input };
  };
  const choices: Record<PlaneEstimator, ReturnType<typeof choice>> = {
    pairwise: choice('pairwise', 'pairwise (Kolchinsky–Tracey, with added noise)'),
    linear: choice('linear', 'linear read-out for I(T;Y), a lower bound'),
    binned: choice('binned', 'binned (the classic picture)'),
  };
  const infoSentence = el('p', { class: 'plane-sentence', 'data-testid': 'plane-sentence', 'aria-live': 'polite' });
  infoSection.append(
    el('h3', {}, 'Information plane (probe windows)'),
    el(
      'p',
      { class: 'note' },
      'Per layer, an estimate of how much its activations say about the input (across) and about the label (up), one path per layer in step order from its first probe window to its latest.',
    ),
    el('fieldset', { class: 'plane-choice', 'data-testid': 'plane-choice' }, el('legend', {}, 'Estimator'), ...Object.values(choices).map((c) => c.label)),
    infoSentence,
    el('p', { class: 'caution' }, PLANE_CAUTION),
    infoLegendBox,
    infoBox,
  );

  let feed: RunFeed | null = null;
  // A link with a step range opens zoomed; its detail is fetched once the run is known.
  const { zoom, controls, fetchDetail } = viewZoom(initial, () => (feed === null ? [] : [feed]));

  const main = el(
    'section',
    { class: 'run' },
    back,
    title,
    facts,
    advice,
    caution,
    ...controls,
    el('h3', {}, 'Phase per layer (estimated)'),
    phaseLegend(),
    stripBox,
    stripNote,
    el('h3', {}, 'Phase level per layer (dB)'),
    levelBox,
    levelNote,
    el('h3', {}, 'Window gradient SNR (dB) per layer'),
    chartBox,
    floorNote,
    chartNote,
    el('h3', {}, 'Weight travel per layer'),
    travelBox,
    travelNote,
    travelTable,
    el('h3', {}, 'Loss'),
    lossBox,
    lossNote,
    el('h3', {}, 'Gradient noise scale (network)'),
    noiseBox,
    noiseText,
    infoSection,
    el('h3', {}, 'Markers'),
    markersNote,
    scrollBox(el('table', { class: 'markers', 'data-testid': 'markers' }, el('thead', {}, el('tr', {}, ...['Step', 'Found at', 'Layer', 'Kind', 'Confidence', 'Details'].map((h) => el('th', {}, h)))), markerBody)),
  );
  root.append(main);

  const level = new LineChart(levelBox, 360, zoom);
  const snr = new LineChart(chartBox, 300, zoom);
  const travel = new LineChart(travelBox, 340, zoom);
  const loss = new LineChart(lossBox, 260, zoom);
  const noise = new LineChart(noiseBox, 260, zoom);

  const layerNames = (): string[] => (feed?.info === null || feed === null ? [] : feed.info.layers.map((l) => l.name));
  const windows = () => feed?.windows ?? [];
  const markers = () => feed?.markers ?? [];

  const drawHeader = (): void => {
    const info = feed?.info;
    if (info === null || info === undefined || feed === null) return;
    title.textContent = info.name;
    const step = feed.lastStep() ?? info.last_step;
    facts.replaceChildren(
      el('span', { class: `status ${info.status}`, 'data-testid': 'run-status' }, info.status),
      ' · step ',
      el('span', { 'data-testid': 'run-step' }, step === null ? '–' : String(step)),
      ` · ${feed.total} windows${feed.total > feed.windows.length ? ` (${feed.windows.length} drawn)` : ''} · ${info.layers.length} layers`,
      info.group === null ? '' : ` · group ${info.group}`,
    );
    const verdict = latestAdvice(markers());
    advice.textContent = adviceSentence(verdict);
    // The tab's title tells the state of a run kept open in the background.
    const phase = step === null ? 'undetermined' : currentPhase(phaseRows([], markers(), 1, Math.max(step, 1))[0]!);
    document.title = `${info.name} · step ${step ?? '–'} · ${phase}${verdict.verdict === 'continue' ? '' : ` · ${verdict.verdict}`} — tidemark`;
  };

  const drawMarkers = (): void => {
    const sorted = [...markers()].sort((a, b) => a.step - b.step || a.detected_step - b.detected_step);
    markersNote.textContent = sorted.length === 0 ? 'No markers yet.' : 'Phase changes are estimated after the fact: "step" is where the change is placed, "found at" when it was detected.';
    markerBody.replaceChildren(
      ...sorted.map((m) =>
        el(
          'tr',
          {},
          el('td', { class: 'num' }, String(m.step)),
          el('td', { class: 'num' }, String(m.detected_step)),
          el('td', {}, m.layer ?? '(network)'),
          el('td', {}, m.kind),
          el('td', { class: 'num' }, formatNumber(m.confidence)),
          el('td', {}, detailsText(m.details)),
        ),
      ),
    );
  };

  const drawStrip = (u: uPlot | null = level.plot): void => {
    if (feed?.info === null || feed === null) return;
    if (u === null || windows().length === 0) {
      stripBox.replaceChildren(el('p', { class: 'note' }, 'No windows yet.'));
      return;
    }
    const axis = stripAxisOf(u);
    if (axis !== null) drawPhaseStrip(stripBox, phaseRows(layerNames(), markers(), axis.min, axis.max), axis);
  };

  const drawSnr = (): void => {
    const lv = levelColumns(layerNames(), windows());
    level.update([lv.steps, ...lv.series], () => ({
      ...stepChart('phase level (dB)'),
      series: [{ label: 'step' }, ...lv.labels.map((l, i) => lineSeries(l, i))],
      // The phase strip follows this chart's step axis, so it is redrawn with it.
      hooks: { draw: [(u) => drawStrip(u), zeroDbLine] },
    }));
    const cols = snrColumns(layerNames(), windows());
    const end = floorEnd(cols.steps, cols.floor);
    floorNote.hidden = end === null;
    if (end !== null) {
      floorNote.textContent =
        `The dashed line ends after step ${end}: from there each window holds a whole epoch, every minibatch of it, ` +
        'so its mean has no sampling noise left to compare with (the finite-population factor 1 − K/M is 0).';
    }
    snr.update([cols.steps, ...cols.series, cols.floor], () => ({
      ...stepChart('window gradient SNR (dB)'),
      series: [{ label: 'step' }, ...cols.labels.map((l, i) => lineSeries(l, i)), { label: 'noise floor', stroke: REFERENCE_GREY, dash: [4, 4], width: 1 }],
      hooks: { draw: [zeroDbLine] },
    }));
  };

  const drawTravel = (): void => {
    const cols = travelColumns(layerNames(), windows());
    if (!cols.series.some((s) => s.some((v) => v !== null))) {
      travel.destroy();
      travelBox.replaceChildren(el('p', { class: 'note' }, 'No weight travel yet.'));
    } else {
      if (travel.plot === null) travelBox.replaceChildren();
      travel.update([cols.steps, ...cols.series, cols.slope1, cols.slopeHalf], () => ({
        ...stepChart('weight travel ‖w − w₀‖ (log scale)', 70),
        series: [
          { label: 'step' },
          ...cols.labels.map((l, i) => lineSeries(l, i)),
          { label: 'slope 1', stroke: REFERENCE_GREY, dash: [10, 5], width: 1 },
          { label: 'slope ½', stroke: REFERENCE_GREY, dash: [2, 4], width: 1.5 },
        ],
      }));
    }
    travelBody.replaceChildren(
      ...cols.labels.map((l, i) =>
        el('tr', { 'data-layer': l }, el('td', {}, l), el('td', { class: 'num' }, cols.exponents[i] === null || cols.exponents[i] === undefined ? '– (too few windows)' : formatNumber(cols.exponents[i]))),
      ),
    );
  };

  const drawLoss = (): void => {
    const cols = lossColumns(windows());
    if (!cols.loss.some((v) => v !== null)) {
      loss.destroy();
      lossBox.replaceChildren(el('p', { class: 'note' }, 'No loss logged yet.'));
      return;
    }
    if (loss.plot === null) lossBox.replaceChildren();
    const data: uPlot.AlignedData = cols.hasVal ? [cols.steps, cols.loss, cols.valLoss] : [cols.steps, cols.loss];
    loss.update(data, () => ({
      ...stepChart('loss'),
      series: [
        { label: 'step' },
        { label: 'loss (training, window mean)', stroke: NETWORK_STYLE.stroke, width: 2, spanGaps: false },
        ...(cols.hasVal
          ? [{ label: 'val_loss (end of epoch)', stroke: VAL_LOSS_STYLE.stroke, dash: VAL_LOSS_STYLE.dash, width: VAL_LOSS_STYLE.width, spanGaps: true, points: { show: true, size: 7, fill: VAL_LOSS_STYLE.pointFill } }]
          : []),
      ],
    }));
  };

  const drawNoise = (): void => {
    const cols = noiseColumns(windows());
    noiseText.textContent = noiseSentence(cols);
    if (!cols.noise.some((v) => v !== null)) {
      noise.destroy();
      noiseBox.replaceChildren(el('p', { class: 'note' }, 'No noise scale estimate yet.'));
      return;
    }
    if (noise.plot === null) noiseBox.replaceChildren();
    noise.update([cols.steps, cols.noise, cols.batch], () => ({
      ...stepChart('examples (log scale)', 60),
      series: [
        { label: 'step' },
        // Measured now and then at fixed weights: dots joined across the windows between measurements.
        {
          label: 'B_simple (network, measured at fixed weights)',
          stroke: NETWORK_STYLE.stroke,
          width: 2,
          spanGaps: true,
          points: { show: true, size: 7, fill: NETWORK_STYLE.stroke },
        },
        { label: 'batch size', stroke: REFERENCE_GREY, dash: [6, 4], width: 1.5 },
      ],
    }));
  };

  function drawInfo(): void {
    const settings = planeSettings(feed?.info?.config ?? {});
    const plane = infoPlane(layerNames(), windows(), estimator, settings);
    if (plane.trajectories.length === 0) {
      infoSection.hidden = true;
      return;
    }
    infoSection.hidden = false;
    infoSection.dataset.estimator = plane.estimator;
    // The radios tell what is drawn; one whose estimator the run's windows lack cannot be chosen.
    for (const [e, c] of Object.entries(choices) as [PlaneEstimator, ReturnType<typeof choice>][]) {
      c.input.disabled = !plane.available[e];
      c.input.checked = plane.estimator === e;
    }
    // Set only when it changes: the line is read out (aria-live) when the estimator changes, not at every live window.
    const sentence = planeSentence(plane, settings);
    if (infoSentence.textContent !== sentence) infoSentence.textContent = sentence;
    infoLegendBox.replaceChildren(infoLegend(plane));
    drawInfoPlane(infoBox, plane, Math.max(280, Math.min(infoSection.clientWidth || 900, 900)));
  }

  const drawSeries = (): void => {
    drawSnr();
    drawTravel();
    drawLoss();
    drawNoise();
    drawInfo();
  };

  // Changes are drawn once per animation frame: windows that arrive together (a poll that found several,
  // a burst after a stall) cost one redraw, not one each.
  let pending = { series: false, markers: false };
  let frame: number | null = null;
  const onChange = (change: FeedChange): void => {
    if (change !== 'marker') pending.series = true;
    if (change !== 'window' && change !== 'detail') pending.markers = true;
    if (change === 'backfill' && feed !== null) fetchDetail([feed]);
    frame ??= requestAnimationFrame(() => {
      frame = null;
      const todo = pending;
      pending = { series: false, markers: false };
      drawHeader();
      if (todo.series) drawSeries();
      if (todo.markers) {
        drawStrip();
        drawMarkers();
      }
    });
  };
  feed = new RunFeed(live, id, 1, onChange, (code, message) => {
    main.replaceChildren(back, el('h2', {}, 'Run not available'), el('p', { class: 'error', 'data-testid': 'run-error' }, refusal(id, code, message)));
  });

  const onResize = (): void => {
    for (const c of [level, snr, travel, loss, noise]) c.resize();
    drawInfo();
  };
  window.addEventListener('resize', onResize);
  return {
    dispose() {
      if (frame !== null) cancelAnimationFrame(frame);
      feed?.dispose();
      window.removeEventListener('resize', onResize);
      for (const c of [level, snr, travel, loss, noise]) c.destroy();
    },
  };
}
