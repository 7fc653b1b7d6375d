/**
 * One run as the page follows it: the backfill, then live windows and markers, resubscribing after a
 * reconnect or a gap with the last step it holds (so nothing is missed or repeated), and the windows of a
 * zoomed range fetched in full detail when the backfill was thinned.
 */
import type { BackfillMessage, LiveMessage } from '../protocol/messages.js';
import { markerKey, type Marker, type WindowRecord } from '../protocol/records.js';
import { getJson, type Live } from './connection.js';
import { mergeWindows, windowBudget, windowsIn, type StepRange } from './model.js';

export type FeedChange = 'backfill' | 'window' | 'marker' | 'detail';

/** A zoomed range holding fewer windows than this is fetched in detail. */
export const DETAIL_ENOUGH = 400;
/** Assumed until the run's layers are known. */
const DEFAULT_LAYERS = 3;

export class RunFeed {
  info: BackfillMessage['run'] | null = null;
  windows: WindowRecord[] = [];
  markers: Marker[] = [];
  /** Windows the run holds in all (more than `windows.length` while the backfill is thinned). */
  total = 0;
  failed = false;
  private readonly keys = new Set<string>();
  private readonly fetched: StepRange[] = [];
  private readonly stopListening: () => void;

  /** Windows asked for in the backfill and in a zoomed range; set from the run's width before subscribing. */
  private points = windowBudget(DEFAULT_LAYERS, 1);
  private stopOpen: () => void = () => {};
  private disposed = false;

  /** What the subscription names: the run's full id once the server has resolved `id`, else `id` itself. */
  private ref: string;

  constructor(
    private readonly live: Live,
    /** The id, id prefix or name the view asked for. */
    readonly id: string,
    /** How many runs share the page (the compare view): each gets that share of the window budget. */
    share: number,
    private readonly onChange: (change: FeedChange) => void,
    private readonly onError: (code: string, message: string) => void,
  ) {
    this.ref = id;
    this.stopListening = live.listen((m) => this.receive(m));
    // The run first: its full id, so the backfill is known for certain (two compared runs' ids can share a
    // prefix), and its layer count, so a wide model gets fewer windows and its first load stays light. A run
    // the server does not know is left to the subscription, whose error message the view shows.
    getJson(`api/runs/${encodeURIComponent(id)}`)
      .then((run) => {
        const r = run as { id?: unknown; layers?: unknown[] };
        if (typeof r.id === 'string') this.ref = r.id;
        if (Array.isArray(r.layers)) this.points = windowBudget(r.layers.length, share);
      })
      .catch(() => {})
      .finally(() => {
        if (!this.disposed) this.stopOpen = live.whenOpen(() => this.subscribe());
      });
  }

  lastStep(): number | null {
    return this.windows.at(-1)?.step ?? null;
  }

  private subscribe(): void {
    if (this.failed) return;
    const after = this.lastStep();
    // The page draws layers, never single variables: it asks for windows without them (a third of the bytes).
    this.live.send(after === null ? { v: 1, type: 'subscribe', run: this.ref, points: this.points, variables: false } : { v: 1, type: 'subscribe', run: this.ref, after, variables: false });
  }

  private addMarkers(list: readonly Marker[]): void {
    for (const m of list) {
      const k = markerKey(m);
      if (this.keys.has(k)) continue;
      this.keys.add(k);
      this.markers.push(m);
    }
  }

  private receive(m: LiveMessage): void {
    if (this.failed) return;
    // Unresolved (the HTTP read failed), the name or an id prefix is all there is to match the backfill by.
    const ours = (id: string, name: string): boolean => id === this.ref || (this.info === null && (name === this.ref || id.startsWith(this.ref)));
    if (m.type === 'backfill' && ours(m.run.id, m.run.name)) {
      this.info = m.run;
      this.ref = m.run.id;
      this.windows = mergeWindows(this.windows, m.windows);
      this.total = Math.max(m.total_windows, this.windows.length);
      this.addMarkers(m.markers);
      this.onChange('backfill');
    } else if (m.type === 'window' && this.info !== null && m.window.run === this.info.id) {
      const before = this.windows.length;
      this.windows = mergeWindows(this.windows, [m.window]);
      if (this.windows.length > before) this.total++;
      this.onChange('window');
    } else if (m.type === 'marker' && this.info !== null && m.marker.run === this.info.id) {
      this.addMarkers([m.marker]);
      this.onChange('marker');
    } else if (m.type === 'gap' && this.info !== null && m.run === this.info.id) {
      this.subscribe();
    } else if (m.type === 'error' && m.run === this.ref) {
      this.failed = true;
      this.onError(m.code, m.message);
    }
  }

  /**
   * Fetches the windows of a zoomed range when the backfill was thinned there; resolves to whether new
   * windows came (then `onChange('detail')` has run).
   */
  async detail(range: StepRange): Promise<boolean> {
    if (this.info === null || this.total <= this.windows.length) return false;
    if (windowsIn(this.windows, range.min, range.max) >= DETAIL_ENOUGH) return false;
    if (this.fetched.some((r) => r.min <= range.min && r.max >= range.max)) return false;
    const from = Math.floor(range.min);
    const to = Math.ceil(range.max);
    const ws = (await getJson(`api/runs/${encodeURIComponent(this.info.id)}/windows?from=${from}&to=${to}&points=${this.points}&variables=false`)) as WindowRecord[];
    this.fetched.push({ min: from, max: to });
    const before = this.windows.length;
    this.windows = mergeWindows(this.windows, ws);
    if (this.windows.length === before) return false;
    this.onChange('detail');
    return true;
  }

  dispose(): void {
    this.disposed = true;
    this.stopListening();
    this.stopOpen();
    if (this.info !== null) this.live.send({ v: 1, type: 'unsubscribe', run: this.info.id });
  }
}
