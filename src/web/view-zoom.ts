/**
 * A view's step range as a whole: the zoom every chart shares, the keyboard form, the range in the URL (so a
 * link reopens it), and the detail of a thinned range fetched for the view's runs with a line saying so.
 */
import { StepZoom, stepRangeForm } from './charts.js';
import { el } from './dom.js';
import { formatNumber, withRange, type StepRange } from './model.js';
import type { RunFeed } from './run-feed.js';

/** The zoomed range goes into the URL (replacing, so Back still leaves the view), and a link reopens it. */
function keepRangeInUrl(range: StepRange | null): void {
  const hash = withRange(location.hash, range);
  if (hash !== location.hash) history.replaceState(null, '', `${location.pathname}${location.search}${hash}`);
}

export interface ViewZoom {
  zoom: StepZoom;
  /** The form, then the line that reports on fetched detail: placed together above the charts. */
  controls: HTMLElement[];
  /** Fetches the detail of the current range for these runs, when zoomed (a run's backfill just came). */
  fetchDetail(of: readonly RunFeed[]): void;
}

/** `initial`: the range from the URL, shown at once; its detail is fetched as each run arrives. */
export function viewZoom(initial: StepRange | null, feeds: () => readonly RunFeed[]): ViewZoom {
  const note = el('p', { class: 'note', 'data-testid': 'detail-note', 'aria-live': 'polite' });
  const fetchDetail = (range: StepRange, of: readonly RunFeed[]): void => {
    note.textContent = '';
    Promise.all(of.map((f) => f.detail(range))).then(
      (got) => {
        if (got.some((g) => g)) note.textContent = `Showing steps ${formatNumber(Math.round(range.min))} to ${formatNumber(Math.round(range.max))} in full detail.`;
      },
      (e: unknown) => {
        note.textContent = `Could not fetch the detail of this range: ${(e as Error).message}`;
      },
    );
  };
  const zoom = new StepZoom((range) => {
    form.show(range);
    keepRangeInUrl(range);
    if (range !== null) fetchDetail(range, feeds());
  });
  const form = stepRangeForm(zoom);
  zoom.range = initial;
  form.show(initial);
  return {
    zoom,
    controls: [form.form, note],
    fetchDetail(of) {
      if (zoom.range !== null) fetchDetail(zoom.range, of);
    },
  };
}
