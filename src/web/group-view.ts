/**
 * The group view (`#/group/NAME`): the runs of one group read together, from `GET /api/groups/:name`. Per
 * layer (one at a time, the network first) the spread across runs of the gradient SNR, the noise scale and
 * the weight travel; every layer's transition across runs as dots with the median and its interval; what
 * each run reached; and a sweep over a numeric tag with its power-law fit. The report is read again when
 * the live runs list says one of the group's runs moved, so the bands grow as windows land.
 */
import type { RunSummary } from '../protocol/messages.js';
import { getJson, type Live } from './connection.js';
import { el, scrollBox, type View } from './dom.js';
import { drawBandChart, drawTransitionStrip, drawSweep } from './group-charts.js';
import {
  GROUP_ALIGN_CHOICES,
  SWEEP_OUTCOME_CHOICES,
  bandPath,
  groupHash,
  groupQuery,
  groupTouched,
  numericTags,
  placeText,
  sweepSentence,
  type GroupReport,
  type GroupRoute,
  type SweepOutcome,
  type SweepReport,
} from './group-model.js';
import { CAUTION, compareLabels, runHash } from './model.js';
import { NETWORK_STYLE, layerStyle } from './palette.js';

const OUTCOME_WORDS: Record<SweepOutcome, string> = {
  'diffusion-start': "where the network's diffusion began",
  stop: 'where the first stop advice came',
  'loss-target': 'where the training loss reached a target',
  'best-validation': 'the best validation value',
};

/** Waits this long after a live update before reading the report again: a burst of windows is one read. */
const REFRESH_MS = 1500;

export function groupView(root: HTMLElement, live: Live, route: GroupRoute): View {
  document.title = `Group ${route.name} — tidemark`;
  const href = (r: GroupRoute): string => `${location.pathname}${location.search}${groupHash(r)}`;
  const go = (r: GroupRoute): void => {
    history.replaceState(null, '', href(r));
    current = r;
    void load();
  };
  let current = route;
  let report: (GroupReport & { sweep: SweepReport | null }) | null = null;
  let layer = 0;

  const title = el('h2', { 'data-testid': 'group-title' }, `Group ${route.name}`);
  const facts = el('p', { class: 'note', 'data-testid': 'group-facts' }, 'Loading the group…');
  const errors = el('p', { class: 'error', 'data-testid': 'group-error' });
  errors.hidden = true;
  const alignBox = el('span', { role: 'radiogroup', 'aria-label': 'Align runs by' });
  const layerPick = el('select', { 'aria-label': 'Layer shown in the bands', 'data-testid': 'group-layer' });
  const strip = el('div', { class: 'plane', 'data-testid': 'group-transitions' });
  const stripText = el('ul', { class: 'facts', 'data-testid': 'group-transition-text' });
  const snrBox = el('div', { class: 'plane', 'data-testid': 'group-band-snr' });
  const noiseBox = el('div', { class: 'plane', 'data-testid': 'group-band-noise' });
  const travelBox = el('div', { class: 'plane', 'data-testid': 'group-band-travel' });
  const bandTitles = [el('h3', {}), el('h3', {}), el('h3', {})] as const;
  const runsBody = el('tbody');
  const runsTable = el(
    'table',
    { class: 'compare-runs', 'data-testid': 'group-runs' },
    el('thead', {}, el('tr', {}, ...['Run', 'Tags', 'Status', 'Last step', 'Advice reached', 'First stop', 'Best validation'].map((h) => el('th', {}, h)))),
    runsBody,
  );
  const tagPick = el('select', { 'aria-label': 'Sweep over the tag', 'data-testid': 'sweep-tag' });
  const outcomePick = el('select', { 'aria-label': 'Outcome on the y axis', 'data-testid': 'sweep-outcome' });
  for (const o of SWEEP_OUTCOME_CHOICES) outcomePick.append(el('option', { value: o }, OUTCOME_WORDS[o]));
  const targetInput = el('input', { type: 'number', min: '0', step: 'any', 'aria-label': 'Training-loss target', 'data-testid': 'sweep-target', placeholder: 'e.g. 0.3' });
  const targetLabel = el('label', {}, ' target loss ', targetInput);
  const sweepText = el('p', { 'data-testid': 'sweep-text' });
  const sweepLeft = el('ul', { class: 'note', 'data-testid': 'sweep-left' });
  const sweepBox = el('div', { class: 'plane', 'data-testid': 'sweep-chart' });
  const updated = el('span', { class: 'note', 'data-testid': 'group-updated' });

  const sweepForm = el('form', { class: 'range', 'data-testid': 'sweep-form' }, 'x: ', tagPick, ' y: ', outcomePick, targetLabel, ' ', el('button', { type: 'submit' }, 'Fit'));
  sweepForm.addEventListener('submit', (ev) => {
    ev.preventDefault();
    const outcome = outcomePick.value as SweepOutcome;
    const target = Number(targetInput.value);
    if (outcome === 'loss-target' && !(target > 0)) {
      targetInput.setCustomValidity('A training loss above 0: each run is placed where its loss first reached it.');
      targetInput.reportValidity();
      return;
    }
    targetInput.setCustomValidity('');
    go({ ...current, sweep: tagPick.value === '' ? null : tagPick.value, outcome, lossTarget: outcome === 'loss-target' ? target : null });
  });
  outcomePick.addEventListener('change', () => {
    targetLabel.hidden = outcomePick.value !== 'loss-target';
  });
  layerPick.addEventListener('change', () => {
    layer = Number(layerPick.value);
    drawBands();
  });

  root.append(
    el(
      'section',
      { class: 'group' },
      el('a', { href: `${location.pathname}${location.search}#/` }, '← all runs'),
      title,
      facts,
      errors,
      el('p', { class: 'caution' }, `Each run is one draw: a band is the spread between seeds, not a guarantee for the next run. ${CAUTION}`),
      el('h3', {}, 'Where each layer began to diffuse, across runs'),
      strip,
      el('p', { class: 'note' }, 'One ring per run that reached it; the bar is the median across runs, the line under it its bootstrap 95 % interval (percentile bootstrap, 2,000 resamples).'),
      stripText,
      el('div', { class: 'toolbar' }, el('span', {}, 'Align by '), alignBox, el('label', {}, 'Layer ', layerPick), updated),
      el('p', { class: 'note' }, 'Line: the median across runs. Dark band: the middle half of the runs (quartiles). Light band: from the lowest run to the highest.'),
      bandTitles[0],
      snrBox,
      bandTitles[1],
      el('p', { class: 'note' }, 'Measured at fixed weights now and then, not every window: each run gives its measurements nearest each point of the log axis; no point where no run measured it.'),
      noiseBox,
      bandTitles[2],
      travelBox,
      el('h3', {}, 'What each run reached'),
      scrollBox(runsTable),
      el('h3', {}, 'Sweep: an outcome against a numeric tag, as a power law'),
      sweepForm,
      sweepText,
      sweepBox,
      sweepLeft,
      el('p', { class: 'note' }, 'y = a·x^b fitted by least squares on log-log axes; below the fit, each run’s residual. Few runs make wide intervals: read the interval before the exponent.'),
    ),
  );

  const chartWidth = (): number => Math.max(300, Math.min(root.clientWidth || 900, 1100));

  function drawBands(): void {
    if (report === null) return;
    const l = report.layers[layer] ?? report.layers[0]!;
    const colour = l.position === null ? NETWORK_STYLE.stroke : layerStyle(l.position).stroke;
    bandTitles[0].textContent = `Gradient SNR (dB) across runs, ${l.layer}`;
    bandTitles[1].textContent = `Noise scale B_noise (examples), ${l.layer} (estimate)`;
    bandTitles[2].textContent = `Weight travel ‖w − w₀‖, ${l.layer}`;
    const w = chartWidth();
    drawBandChart(snrBox, bandPath(report.grid, l.snrDb, false), { align: report.align, yTitle: 'gradient SNR (dB)', log: false, width: w, colour, zeroLine: true });
    drawBandChart(noiseBox, bandPath(report.grid, l.noiseScale, true), { align: report.align, yTitle: 'examples (log scale)', log: true, width: w, colour });
    drawBandChart(travelBox, bandPath(report.grid, l.weightTravel, true), { align: report.align, yTitle: '‖w − w₀‖ (log scale)', log: true, width: w, colour });
  }

  function draw(): void {
    const r = report!;
    const labels = compareLabels(r.runs.map((x) => ({ id: x.id, name: x.name, tags: x.tags })));
    const unit = r.align === 'epoch' ? 'epoch' : 'step';
    const notes = [
      `${r.runs.length} run${r.runs.length === 1 ? '' : 's'}, aligned by ${unit}: each run's windows are interpolated on log ${unit} onto ${r.grid.length} shared points, never beyond its own first and last window.`,
    ];
    if (r.byPosition) notes.push('The runs name their layers differently: layers are compared by position, named as in the first run.');
    if (r.leftOut.length > 0) notes.push(`The runs differ in depth: layers are compared by name; ${r.leftOut.join(', ')} (not in every run) ${r.leftOut.length === 1 ? 'is' : 'are'} left out.`);
    if (r.unaligned.length > 0) notes.push(`${r.unaligned.length} run${r.unaligned.length === 1 ? ' is' : 's are'} left out: no epoch length is known (trained outside fit, or not past its first epoch).`);
    facts.textContent = notes.join(' ');

    alignBox.replaceChildren(
      ...GROUP_ALIGN_CHOICES.map((a) => {
        const input = el('input', { type: 'radio', name: 'group-align', value: a, 'data-testid': `group-align-${a}` });
        input.checked = r.align === a;
        input.addEventListener('change', () => go({ ...current, align: a }));
        return el('label', {}, input, ` ${a} `);
      }),
    );
    const chosen = String(Math.min(layer, r.layers.length - 1));
    layerPick.replaceChildren(...r.layers.map((l, i) => el('option', { value: String(i) }, l.layer)));
    layerPick.value = chosen;

    drawTransitionStrip(strip, r, labels, chartWidth());
    stripText.replaceChildren(
      ...r.layers.map((l) => {
        const reached = l.transitions.filter((t) => t !== null).length;
        const text =
          l.transition === null
            ? `${l.layer}: ${reached} of ${r.runs.length} runs began to diffuse (2 needed for an interval)`
            : `${l.layer}: median ${placeText(r.align, l.transition.median)}, 95 % interval ${placeText(r.align, l.transition.low)} to ${placeText(r.align, l.transition.high)}, over ${l.transition.n} of ${r.runs.length} runs`;
        return el('li', { 'data-layer': l.layer }, text);
      }),
    );
    drawBands();

    runsBody.replaceChildren(
      ...r.runs.map((run, k) => {
        const o = r.outcomes[k]!;
        return el(
          'tr',
          { 'data-run': run.id },
          el('td', {}, el('a', { href: `${location.pathname}${location.search}${runHash(run.id)}` }, labels[k] ?? run.name)),
          el('td', {}, Object.entries(run.tags).map(([key, v]) => `${key}=${v}`).join(' ')),
          el('td', { class: `status ${run.status}` }, run.status),
          el('td', { class: 'num' }, run.last_step === null ? '–' : String(run.last_step)),
          el('td', {}, o.advice === null ? 'no advice yet' : `${o.advice.verdict} at ${placeText(r.align, o.advice.at)}`),
          el('td', {}, o.stop === null ? '–' : placeText(r.align, o.stop)),
          el('td', {}, o.bestValidation === null ? '–' : `${o.bestValidation.metric} ${o.bestValidation.value.toPrecision(4)} at ${placeText(r.align, o.bestValidation.at)}`),
        );
      }),
    );

    const tags = numericTags(r.runs);
    tagPick.replaceChildren(el('option', { value: '' }, tags.length === 0 ? '(no numeric tag in 2 runs)' : '(choose a tag)'), ...tags.map((t) => el('option', { value: t }, t)));
    tagPick.value = current.sweep !== null && tags.includes(current.sweep) ? current.sweep : '';
    outcomePick.value = current.outcome;
    targetInput.value = current.lossTarget === null ? '' : String(current.lossTarget);
    targetLabel.hidden = current.outcome !== 'loss-target';
    const w = r.sweep;
    if (w === null) {
      sweepText.textContent = tags.length === 0 ? 'Tag runs with a number (depth, batch size, data fraction…) to sweep over it.' : 'Choose a tag and an outcome, then Fit.';
      sweepBox.replaceChildren();
      sweepLeft.replaceChildren();
    } else {
      const yTitle = w.outcome === 'best-validation' ? `best ${w.units} (log scale)` : `${w.units} (log scale)`;
      sweepText.textContent = `${OUTCOME_WORDS[w.outcome]} against ${w.tag}, ${w.points.length} run${w.points.length === 1 ? '' : 's'}. ${sweepSentence(w)}`;
      drawSweep(sweepBox, w, yTitle, chartWidth());
      sweepLeft.replaceChildren(...w.left.map((x) => el('li', {}, `left out: ${labels[r.runs.findIndex((run) => run.id === x.run)] ?? x.run} (${x.why})`)));
    }
    updated.textContent = `read at ${new Date().toLocaleTimeString()}`;
  }

  let loading = false;
  let again = false;
  async function load(): Promise<void> {
    if (loading) {
      again = true;
      return;
    }
    loading = true;
    try {
      report = (await getJson(groupQuery(current))) as GroupReport & { sweep: SweepReport | null };
      errors.hidden = true;
      draw();
    } catch (e) {
      errors.hidden = false;
      errors.textContent = `Could not read group ${current.name}: ${(e as Error).message}`;
      if (report === null) facts.textContent = '';
    } finally {
      loading = false;
      if (again) {
        again = false;
        void load();
      }
    }
  }
  void load();

  // Live: the runs list tells when a run of the group moved; the report is then read again.
  const seen = new Map<string, string>();
  let primed = false;
  let timer: ReturnType<typeof setTimeout> | null = null;
  const stopListening = live.listen((m) => {
    if (m.type !== 'runs') return;
    // The first list only says where the runs are: the report was just read.
    const touched = groupTouched(seen, current.name, m.runs as RunSummary[]);
    if (!primed) {
      primed = true;
      return;
    }
    if (!touched) return;
    timer ??= setTimeout(() => {
      timer = null;
      void load();
    }, REFRESH_MS);
  });
  const stopOpen = live.whenOpen(() => live.send({ v: 1, type: 'subscribe-runs' }));
  const onResize = (): void => {
    if (report !== null) draw();
  };
  window.addEventListener('resize', onResize);
  return {
    dispose() {
      if (timer !== null) clearTimeout(timer);
      stopListening();
      stopOpen();
      live.send({ v: 1, type: 'unsubscribe' });
      window.removeEventListener('resize', onResize);
    },
  };
}
