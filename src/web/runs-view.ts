/**
 * The runs list: search by name, group or tag, live status, and a choice of 2 to 6 runs to compare.
 */
import type { RunSummary } from '../protocol/messages.js';
import { getJson, type Live } from './connection.js';
import { el, scrollBox, type View } from './dom.js';
import { groupHash } from './group-model.js';
import { COMPARE_MAX, COMPARE_MIN, compareHash, mergeRuns, runHash, runMatches, type RunRowView } from './model.js';

export function runsView(root: HTMLElement, live: Live): View {
  document.title = 'Runs — tidemark';
  let rows: RunRowView[] = [];
  const chosen = new Set<string>();
  const search = el('input', { type: 'search', placeholder: 'filter by name, group or tag (key=value)', 'aria-label': 'Filter runs', 'data-testid': 'run-filter' });
  const compare = el('button', { type: 'button', 'data-testid': 'compare-button', disabled: '' }, 'Compare');
  const compareNote = el('span', { class: 'note', 'data-testid': 'compare-note' });
  const body = el('tbody');
  const note = el('p', { class: 'note' }, 'Loading runs…');
  const table = el(
    'table',
    { class: 'runs', 'data-testid': 'runs' },
    el('thead', {}, el('tr', {}, el('th', {}, el('span', { class: 'sr-only' }, 'Compare')), ...['Run', 'Group', 'Tags', 'Status', 'Last step', 'Windows', 'Started'].map((h) => el('th', {}, h)))),
    body,
  );
  root.append(el('h2', {}, 'Runs'), el('div', { class: 'toolbar' }, search, compare, compareNote), note, scrollBox(table));

  const drawCompare = (): void => {
    const n = chosen.size;
    compare.disabled = n < COMPARE_MIN || n > COMPARE_MAX;
    compare.textContent = n === 0 ? 'Compare' : `Compare ${n} runs`;
    compareNote.textContent = n < COMPARE_MIN ? `tick ${COMPARE_MIN} to ${COMPARE_MAX} runs to overlay them` : n > COMPARE_MAX ? `at most ${COMPARE_MAX} runs at once` : '';
  };
  compare.addEventListener('click', () => {
    // In list order, so the colours follow the rows.
    const ids = rows.map((r) => r.id).filter((id) => chosen.has(id));
    location.hash = compareHash(ids);
  });

  const draw = (): void => {
    // A live update rebuilds the rows; whoever was tabbing through them keeps their place.
    const active = document.activeElement;
    const focusedRun = active instanceof HTMLElement && body.contains(active) ? (active.closest('tr')?.dataset.run ?? null) : null;
    const focusedBox = active instanceof HTMLInputElement;
    const shown = rows.filter((r) => runMatches(r, search.value));
    note.textContent = rows.length === 0 ? 'No runs stored yet.' : shown.length === 0 ? 'No run matches the filter.' : `${shown.length} of ${rows.length} runs`;
    body.replaceChildren(
      ...shown.map((r) => {
        const box = el('input', { type: 'checkbox', 'aria-label': `Compare ${r.name}`, 'data-testid': 'compare-pick' });
        box.checked = chosen.has(r.id);
        box.addEventListener('change', () => {
          if (box.checked) chosen.add(r.id);
          else chosen.delete(r.id);
          drawCompare();
        });
        return el(
          'tr',
          { 'data-run': r.id },
          el('td', {}, box),
          el('td', {}, el('a', { href: `${location.pathname}${location.search}${runHash(r.id)}` }, r.name)),
          el('td', {}, r.group === null ? '' : el('a', { href: `${location.pathname}${location.search}${groupHash({ name: r.group, align: 'step', sweep: null, outcome: 'diffusion-start', lossTarget: null })}`, title: `The runs of group ${r.group} together` }, r.group)),
          el('td', {}, Object.entries(r.tags).map(([k, v]) => `${k}=${v}`).join(' ')),
          el('td', { class: `status ${r.status}` }, r.status),
          el('td', { class: 'num' }, r.last_step === null ? '–' : String(r.last_step)),
          el('td', { class: 'num' }, String(r.windows)),
          el('td', {}, new Date(r.created_at).toLocaleString()),
        );
      }),
    );
    if (focusedRun !== null) {
      const row = Array.from(body.rows).find((tr) => tr.dataset.run === focusedRun);
      const target = row?.querySelector(focusedBox ? 'input' : 'a');
      if (target instanceof HTMLElement) target.focus();
    }
  };
  search.addEventListener('input', draw);
  drawCompare();

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
