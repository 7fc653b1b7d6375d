/**
 * The tidemark page: a runs picker and a run view (header, stop advice, a phase strip over the gradient
 * SNR per layer against step, weight travel, loss, noise scale, the information plane when a probe ran, markers), fed by the HTTP API and the `/live` WebSocket (docs/protocol.md). The view lives in the
 * URL fragment (`#/run/<id>`) so a link reopens it; a token given as `?token=` travels with every request.
 */
import uPlot from 'uplot';
import 'uplot/dist/uPlot.min.css';
import './style.css';
import type { BackfillMessage, LiveMessage, RunSummary, ViewerMessage } from '../protocol/messages.js';
import type { Marker, WindowRecord } from '../protocol/records.js';
import {
  CAUTION,
  adviceSentence,
  decodeJson,
  detailsText,
  formatNumber,
  infoTrajectories,
  latestAdvice,
  lossColumns,
  noiseColumns,
  noiseSentence,
  phaseRows,
  travelColumns,
  mergeRuns,
  parseRoute,
  runHash,
  runMatches,
  snrColumns,
  tokenFrom,
  type RunRowView,
} from './model.js';
import { NETWORK_STYLE, OKABE_ITO, REFERENCE_GREY, layerStyle } from './palette.js';
import { LineChart, drawInfoPlane, drawPhaseStrip, infoLegend, lineSeries, logValues, phaseLegend } from './charts.js';

const token = tokenFrom(location.search, location.hash);
const root = document.getElementById('app')!;

function el<K extends keyof HTMLElementTagNameMap>(tag: K, attrs: Record<string, string> = {}, ...children: (Node | string)[]): HTMLElementTagNameMap[K] {
  const e = document.createElement(tag);
  for (const [k, v] of Object.entries(attrs)) e.setAttribute(k, v);
  e.append(...children);
  return e;
}

function withToken(path: string): string {
  if (token === null) return path;
  return `${path}${path.includes('?') ? '&' : '?'}token=${encodeURIComponent(token)}`;
}

async function getJson(path: string): Promise<unknown> {
  const res = await fetch(withToken(path), { headers: { accept: 'application/json' } });
  const body = decodeJson(await res.text());
  if (!res.ok) {
    const err = (body as { error?: { code?: string; message?: string } }).error;
    throw new Error(err?.message ?? `HTTP ${res.status}`);
  }
  return body;
}

// ---------------------------------------------------------------------------------------------
// The live connection: one WebSocket, reopened with a growing delay when it drops.

type Listener = (m: LiveMessage) => void;

class Live {
  private ws: WebSocket | null = null;
  private listeners = new Set<Listener>();
  private onOpen = new Set<() => void>();
  private delay = 500;
  private closed = false;

  constructor() {
    this.connect();
  }

  private connect(): void {
    const url = new URL(withToken('live'), location.href);
    url.protocol = location.protocol === 'https:' ? 'wss:' : 'ws:';
    const ws = new WebSocket(url);
    this.ws = ws;
    ws.onopen = () => {
      this.delay = 500;
      setStatus('live');
      for (const f of this.onOpen) f();
    };
    ws.onmessage = (ev) => {
      const m = decodeJson(String(ev.data)) as LiveMessage;
      for (const f of this.listeners) f(m);
    };
    ws.onclose = () => {
      this.ws = null;
      if (this.closed) return;
      setStatus('reconnecting…');
      setTimeout(() => this.connect(), this.delay);
      this.delay = Math.min(this.delay * 2, 10_000);
    };
  }

  send(m: ViewerMessage): void {
    if (this.ws?.readyState === WebSocket.OPEN) this.ws.send(JSON.stringify(m));
  }

  get open(): boolean {
    return this.ws?.readyState === WebSocket.OPEN;
  }

  /** Calls `f` now if connected and again after every reconnect; returns the unsubscriber. */
  whenOpen(f: () => void): () => void {
    this.onOpen.add(f);
    if (this.open) f();
    return () => this.onOpen.delete(f);
  }

  listen(f: Listener): () => void {
    this.listeners.add(f);
    return () => this.listeners.delete(f);
  }
}

const statusEl = el('span', { class: 'conn', 'data-testid': 'connection' }, 'connecting…');
function setStatus(s: string): void {
  statusEl.textContent = s;
}

const live = new Live();

// ---------------------------------------------------------------------------------------------
// Views

type View = { dispose(): void };
let current: View | null = null;

function render(): void {
  current?.dispose();
  root.replaceChildren();
  const route = parseRoute(location.hash);
  current = route.view === 'run' ? runView(route.id) : runsView();
}

function linkToRun(id: string): string {
  // The fragment is the route; the token, if any, stays in the query.
  return `${location.pathname}${location.search}${runHash(id)}`;
}

function runsView(): View {
  let rows: RunRowView[] = [];
  const search = el('input', { type: 'search', placeholder: 'filter by name, group or tag (key=value)', 'aria-label': 'Filter runs', 'data-testid': 'run-filter' });
  const body = el('tbody');
  const note = el('p', { class: 'note' }, 'Loading runs…');
  const table = el(
    'table',
    { class: 'runs', 'data-testid': 'runs' },
    el('thead', {}, el('tr', {}, ...['Run', 'Group', 'Tags', 'Status', 'Last step', 'Windows', 'Started'].map((h) => el('th', {}, h)))),
    body,
  );
  root.append(el('h2', {}, 'Runs'), search, note, table);

  const draw = (): void => {
    const shown = rows.filter((r) => runMatches(r, search.value));
    note.textContent = rows.length === 0 ? 'No runs stored yet.' : shown.length === 0 ? 'No run matches the filter.' : `${shown.length} of ${rows.length} runs`;
    body.replaceChildren(
      ...shown.map((r) =>
        el(
          'tr',
          { 'data-run': r.id },
          el('td', {}, el('a', { href: linkToRun(r.id) }, r.name)),
          el('td', {}, r.group ?? ''),
          el('td', {}, Object.entries(r.tags).map(([k, v]) => `${k}=${v}`).join(' ')),
          el('td', { class: `status ${r.status}` }, r.status),
          el('td', { class: 'num' }, r.last_step === null ? '–' : String(r.last_step)),
          el('td', { class: 'num' }, String(r.windows)),
          el('td', {}, new Date(r.created_at).toLocaleString()),
        ),
      ),
    );
  };
  search.addEventListener('input', draw);

  getJson('api/runs')
    .then((list) => {
      rows = mergeRuns(rows, (list as { runs?: RunSummary[] }).runs ?? (list as RunSummary[]));
      draw();
    })
    .catch((e: unknown) => {
      note.textContent = `Could not load the runs: ${(e as Error).message}`;
    });

  const stopListening = live.listen((m) => {
    if (m.type === 'runs') {
      rows = mergeRuns(rows, m.runs);
      draw();
    }
  });
  const stopOpen = live.whenOpen(() => live.send({ v: 1, type: 'subscribe-runs' }));
  return {
    dispose() {
      stopListening();
      stopOpen();
      live.send({ v: 1, type: 'unsubscribe' });
    },
  };
}

function runView(id: string): View {
  const back = el('a', { href: `${location.pathname}${location.search}#/` }, '← all runs');
  const title = el('h2', { 'data-testid': 'run-name' }, id);
  const facts = el('p', { class: 'facts', 'data-testid': 'run-facts' }, 'Loading…');
  const advice = el('p', { class: 'advice', 'data-testid': 'advice' });
  const caution = el('p', { class: 'caution', 'data-testid': 'caution' }, CAUTION);
  const chartBox = el('div', { class: 'chart', 'data-testid': 'snr-chart' });
  const chartNote = el(
    'p',
    { class: 'note' },
    'Gradient signal-to-noise per layer, in dB (20·log10 of |mean gradient| / gradient spread over a window), against step on a log axis. ' +
      'Above 0 dB the mean gradient outweighs its noise; the dashed grey line is where pure noise would read.',
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
  infoSection.append(
    el('h3', {}, 'Information plane (probe windows)'),
    el(
      'p',
      { class: 'note' },
      'Per layer, the binned estimate of how much its activations say about the input (across) and about the label (up), joined in step order. ' +
        'Hollow grey rings are windows where the estimate is saturated: says nothing, they are not measurements. Binned estimates depend on the bin count; read shapes, not exact values.',
    ),
    infoLegendBox,
    infoBox,
  );
  const main = el(
    'section',
    { class: 'run' },
    back,
    title,
    facts,
    advice,
    caution,
    el('h3', {}, 'Phase per layer (estimated)'),
    phaseLegend(),
    stripBox,
    stripNote,
    el('h3', {}, 'Gradient SNR (dB) per layer'),
    chartBox,
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
    el('table', { class: 'markers', 'data-testid': 'markers' }, el('thead', {}, el('tr', {}, ...['Step', 'Found at', 'Layer', 'Kind', 'Confidence', 'Details'].map((h) => el('th', {}, h)))), markerBody),
  );
  root.append(main);

  let info: BackfillMessage['run'] | null = null;
  let windows: WindowRecord[] = [];
  let markers: Marker[] = [];
  let plot: uPlot | null = null;
  let failed = false;

  const lastStep = (): number | null => (windows.length === 0 ? null : Math.max(...windows.map((w) => w.step)));

  const drawHeader = (): void => {
    if (info === null) return;
    title.textContent = info.name;
    const step = lastStep() ?? info.last_step;
    facts.replaceChildren(
      el('span', { class: `status ${info.status}`, 'data-testid': 'run-status' }, info.status),
      ' · step ',
      el('span', { 'data-testid': 'run-step' }, step === null ? '–' : String(step)),
      ` · ${info.windows} windows · ${info.layers.length} layers`,
      info.group === null ? '' : ` · group ${info.group}`,
    );
    advice.textContent = adviceSentence(latestAdvice(markers));
  };

  const drawMarkers = (): void => {
    const sorted = [...markers].sort((a, b) => a.step - b.step || a.detected_step - b.detected_step);
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

  const drawChart = (): void => {
    if (info === null) return;
    const cols = snrColumns(
      info.layers.map((l) => l.name),
      windows,
    );
    const data: uPlot.AlignedData = [cols.steps, ...cols.series, cols.floor];
    if (plot !== null && plot.series.length === cols.labels.length + 2) {
      plot.setData(data);
      return;
    }
    plot?.destroy();
    const width = Math.max(320, Math.min(chartBox.clientWidth || 900, 1100));
    const opts: uPlot.Options = {
      width,
      height: 360,
      scales: { x: { time: false, distr: 3 }, y: { auto: true } },
      axes: [
        // On a log axis uPlot passes null for the ticks it leaves unlabelled.
        { label: 'step (log scale)', values: (_u, ticks) => ticks.map((t: number | null) => (t === null ? '' : formatNumber(t))) },
        { label: 'gradient SNR (dB)' },
      ],
      series: [
        { label: 'step' },
        ...cols.labels.map((label, i): uPlot.Series => {
          if (i === cols.labels.length - 1) return { label, stroke: NETWORK_STYLE.stroke, width: NETWORK_STYLE.width, spanGaps: false };
          const s = layerStyle(i);
          return { label, stroke: s.stroke, dash: s.dash, width: 1.5, spanGaps: false };
        }),
        { label: 'noise floor', stroke: REFERENCE_GREY, dash: [4, 4], width: 1 },
      ],
      hooks: {
        // The phase strip follows the chart's step axis, so it is redrawn with it.
        draw: [
          (u) => drawStrip(u),
          // The 0 dB line: mean gradient and its noise of equal size.
          (u) => {
            const y = u.valToPos(0, 'y', true);
            if (!Number.isFinite(y) || y < u.bbox.top || y > u.bbox.top + u.bbox.height) return;
            const ctx = u.ctx;
            ctx.save();
            ctx.strokeStyle = REFERENCE_GREY;
            ctx.lineWidth = 1.5 * devicePixelRatio;
            ctx.setLineDash([]);
            ctx.beginPath();
            ctx.moveTo(u.bbox.left, y);
            ctx.lineTo(u.bbox.left + u.bbox.width, y);
            ctx.stroke();
            ctx.fillStyle = REFERENCE_GREY;
            ctx.font = `${11 * devicePixelRatio}px sans-serif`;
            ctx.textAlign = 'right';
            ctx.fillText('0 dB', u.bbox.left + u.bbox.width - 4 * devicePixelRatio, y - 4 * devicePixelRatio);
            ctx.restore();
          },
        ],
      },
    };
    plot = new uPlot(opts, data, chartBox);
  };

  const layerNames = (): string[] => (info === null ? [] : info.layers.map((l) => l.name));

  const drawStrip = (u: uPlot | null = plot): void => {
    if (info === null) return;
    if (u === null || windows.length === 0) {
      stripBox.replaceChildren(el('p', { class: 'note' }, 'No windows yet.'));
      return;
    }
    const min = u.scales.x?.min;
    const max = u.scales.x?.max;
    if (min === undefined || max === undefined || !(min > 0) || !(max > min)) return;
    const ratio = uPlot.pxRatio;
    drawPhaseStrip(stripBox, phaseRows(layerNames(), markers, min, max), {
      width: u.width,
      left: u.bbox.left / ratio,
      plotWidth: u.bbox.width / ratio,
      min,
      max,
    });
  };

  const travel = new LineChart(travelBox, 340);
  const loss = new LineChart(lossBox, 260);
  const noise = new LineChart(noiseBox, 260);
  const xLog: uPlot.Scale = { time: false, distr: 3 };

  const drawTravel = (): void => {
    const cols = travelColumns(layerNames(), windows);
    if (!cols.series.some((s) => s.some((v) => v !== null))) {
      travel.destroy();
      travelBox.replaceChildren(el('p', { class: 'note' }, 'No weight travel yet.'));
    } else {
      if (travel.plot === null) travelBox.replaceChildren();
      travel.update([cols.steps, ...cols.series, cols.slope1, cols.slopeHalf], () => ({
        scales: { x: xLog, y: { distr: 3 } },
        axes: [
          { label: 'step (log scale)', values: logValues },
          { label: 'weight travel ‖w − w₀‖ (log scale)', values: logValues, size: 70 },
        ],
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
    const cols = lossColumns(windows);
    if (!cols.loss.some((v) => v !== null)) {
      loss.destroy();
      lossBox.replaceChildren(el('p', { class: 'note' }, 'No loss logged yet.'));
      return;
    }
    if (loss.plot === null) lossBox.replaceChildren();
    const data: uPlot.AlignedData = cols.hasVal ? [cols.steps, cols.loss, cols.valLoss] : [cols.steps, cols.loss];
    loss.update(data, () => ({
      scales: { x: xLog, y: { auto: true } },
      axes: [{ label: 'step (log scale)', values: logValues }, { label: 'loss' }],
      series: [
        { label: 'step' },
        { label: 'loss (training, window mean)', stroke: NETWORK_STYLE.stroke, width: 2, spanGaps: false },
        ...(cols.hasVal ? [{ label: 'val_loss (end of epoch)', stroke: OKABE_ITO.vermillion, dash: [6, 3], width: 1.5, spanGaps: true, points: { show: true, size: 7, fill: OKABE_ITO.vermillion } }] : []),
      ],
    }));
  };

  const drawNoise = (): void => {
    const cols = noiseColumns(windows);
    noiseText.textContent = noiseSentence(cols);
    if (!cols.noise.some((v) => v !== null)) {
      noise.destroy();
      noiseBox.replaceChildren(el('p', { class: 'note' }, 'No noise scale estimate yet.'));
      return;
    }
    if (noise.plot === null) noiseBox.replaceChildren();
    noise.update([cols.steps, cols.noise, cols.batch], () => ({
      scales: { x: xLog, y: { distr: 3 } },
      axes: [
        { label: 'step (log scale)', values: logValues },
        { label: 'examples (log scale)', values: logValues, size: 60 },
      ],
      series: [
        { label: 'step' },
        { label: 'B_noise (network, estimate)', stroke: NETWORK_STYLE.stroke, width: 2, spanGaps: false },
        { label: 'batch size', stroke: REFERENCE_GREY, dash: [6, 4], width: 1.5 },
      ],
    }));
  };

  const drawInfo = (): void => {
    const traj = infoTrajectories(layerNames(), windows);
    if (traj.length === 0) {
      infoSection.hidden = true;
      return;
    }
    infoSection.hidden = false;
    infoLegendBox.replaceChildren(infoLegend(traj));
    drawInfoPlane(infoBox, traj, Math.max(320, Math.min(infoSection.clientWidth || 900, 900)));
  };

  const drawSeries = (): void => {
    drawChart();
    drawTravel();
    drawLoss();
    drawNoise();
    drawInfo();
  };

  const showError = (text: string): void => {
    failed = true;
    main.replaceChildren(back, el('h2', {}, 'Run not available'), el('p', { class: 'error', 'data-testid': 'run-error' }, text));
  };

  const subscribe = (): void => {
    if (failed) return;
    const after = lastStep();
    live.send(after === null ? { v: 1, type: 'subscribe', run: id, points: 2000 } : { v: 1, type: 'subscribe', run: id, after });
  };

  const stopListening = live.listen((m) => {
    if (failed) return;
    if (m.type === 'backfill' && (m.run.id === id || m.run.name === id || m.run.id.startsWith(id))) {
      info = m.run;
      const have = new Set(windows.map((w) => w.step));
      windows = [...windows, ...m.windows.filter((w) => !have.has(w.step))];
      const keys = new Set(markers.map(markerKey));
      markers = [...markers, ...m.markers.filter((k) => !keys.has(markerKey(k)))];
      drawHeader();
      drawSeries();
      drawStrip();
      drawMarkers();
    } else if (m.type === 'window' && info !== null && m.window.run === info.id) {
      if (!windows.some((w) => w.step === m.window.step)) windows.push(m.window);
      info = { ...info, windows: Math.max(info.windows + 1, windows.length), last_step: m.window.step };
      drawHeader();
      drawSeries();
    } else if (m.type === 'marker' && info !== null && m.marker.run === info.id) {
      markers.push(m.marker);
      drawHeader();
      drawStrip();
      drawMarkers();
    } else if (m.type === 'gap' && info !== null && m.run === info.id) {
      subscribe();
    } else if (m.type === 'error' && m.run === id) {
      showError(
        m.code === 'TIDEMARK_ERR_RUN_NOT_FOUND'
          ? `No run matches “${id}”. Check the link, or pick a run from the list.`
          : m.code === 'TIDEMARK_ERR_RUN_AMBIGUOUS'
            ? `“${id}” matches more than one run; use a longer id.`
            : `The server refused this run: ${m.message}`,
      );
    }
  });
  const stopOpen = live.whenOpen(subscribe);
  const onResize = (): void => {
    if (plot !== null) plot.setSize({ width: Math.max(320, Math.min(chartBox.clientWidth, 1100)), height: 360 });
    travel.resize();
    loss.resize();
    noise.resize();
    drawInfo();
  };
  window.addEventListener('resize', onResize);
  return {
    dispose() {
      stopListening();
      stopOpen();
      window.removeEventListener('resize', onResize);
      if (info !== null) live.send({ v: 1, type: 'unsubscribe', run: id });
      plot?.destroy();
      travel.destroy();
      loss.destroy();
      noise.destroy();
    },
  };
}

function markerKey(m: Marker): string {
  return `${m.kind}|${m.layer ?? ''}|${m.step}|${m.detected_step}`;
}

document.getElementById('conn-slot')?.append(statusEl);
window.addEventListener('hashchange', render);
render();
