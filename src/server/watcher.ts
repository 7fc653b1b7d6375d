/**
 * Turns what lands in the store into live messages. Runs may be written by this server (remote ingest), by
 * another server on the same database, or by training processes writing the same SQLite file directly, so
 * the store is the one source: the watcher polls it (and is nudged at once after an ingest), and publishes
 * each new window and marker of followed runs in step order; the hub sends each to a viewer once (the
 * backfill counts). Reads start from the earliest step any viewer of the run has, so a window stored while
 * a viewer's backfill was being read still reaches it.
 */
import type { RunSummary } from '../protocol/messages.js';
import type { AsyncStore } from '../storage/async-store.js';
import type { RunRow } from '../storage/store.js';
import type { LiveHub } from './live.js';

interface Seen {
  row: RunSummary;
  /** Step of the last window published. */
  lastStep: number | null;
  /** Where the last read of the run's markers ended (Store.markersSince); null while nobody follows the run. */
  markerCursor: number | null;
}

export function summaryOf(r: RunRow): RunSummary {
  return {
    id: r.id,
    name: r.name,
    group: r.group,
    tags: r.tags,
    status: r.status,
    created_at: r.created_at,
    ended_at: r.ended_at,
    last_step: r.last_step,
    windows: r.windows,
  };
}

export class StoreWatcher {
  private readonly store: AsyncStore;
  private readonly hub: LiveHub;
  private readonly seen = new Map<string, Seen>();
  private timer: NodeJS.Timeout | null = null;
  private pending = false;
  private stopped = false;
  /** The poll in progress (null when none), and whether another was asked for meanwhile. */
  private current: Promise<void> | null = null;
  private again = false;
  private readonly unlisten: Promise<(() => Promise<void>) | null> | null;
  private readonly onError: (e: unknown) => void;

  constructor(store: AsyncStore, hub: LiveHub, options: { intervalMs: number; onError: (e: unknown) => void }) {
    this.store = store;
    this.hub = hub;
    this.onError = options.onError;
    this.timer = setInterval(() => void this.poll(), options.intervalMs);
    this.timer.unref();
    // A store that says when something changed (another server stored a window) is looked at at once.
    this.unlisten = this.store.onChange?.(() => this.nudge()).catch((e: unknown) => {
      this.onError(e);
      return null;
    }) ?? null;
  }

  /** Something was stored just now: look at once (coalesced into one poll per turn of the event loop). */
  nudge(): void {
    if (this.pending || this.stopped) return;
    this.pending = true;
    setImmediate(() => {
      this.pending = false;
      void this.poll();
    });
  }

  /** The run's markers are read from the first again at the next poll (a viewer just followed it). */
  resync(runId: string): void {
    const s = this.seen.get(runId);
    if (s !== undefined) s.markerCursor = null;
    this.nudge();
  }

  /** One look at the store; a poll asked for while one runs happens right after it, never alongside. */
  async poll(): Promise<void> {
    if (this.stopped) return;
    if (this.current !== null) {
      this.again = true;
      return;
    }
    this.current = (async () => {
      do {
        this.again = false;
        await this.pollOnce();
      } while (this.again && !this.stopped);
    })();
    try {
      await this.current;
    } finally {
      this.current = null;
    }
  }

  private async pollOnce(): Promise<void> {
    try {
      const rows = await this.store.runs();
      const followed = this.hub.followedRuns();
      for (const r of rows) {
        const row = summaryOf(r);
        let s = this.seen.get(r.id);
        if (s === undefined) {
          // A run first seen now: its past is the backfill's business, not the live stream's. But a viewer may
          // have subscribed (and had its backfill) before this poll: it is owed what came after its backfill.
          s = { row, lastStep: r.last_step, markerCursor: null };
          this.seen.set(r.id, s);
          this.hub.publishRun(row);
          if (!followed.has(r.id)) continue;
          s.lastStep = this.hub.earliestStep(r.id);
        } else {
          const changed = s.row.status !== row.status || s.row.windows !== row.windows || s.row.last_step !== row.last_step || s.row.ended_at !== row.ended_at;
          s.row = row;
          if (changed) this.hub.publishRun(row);
        }
        if (!followed.has(r.id)) {
          s.lastStep = r.last_step;
          s.markerCursor = null;
          continue;
        }
        // Markers are read before windows: a marker stored with its window (one batch, one commit) then never
        // reaches a viewer ahead of that window, even where each read is its own snapshot (PostgreSQL).
        const { markers, cursor } = await this.store.markersSince(r.id, s.markerCursor ?? 0);
        const behind = this.hub.earliestStep(r.id);
        const from = s.lastStep === null || behind === null ? null : Math.min(s.lastStep, behind);
        if (markers.length > 0 || (r.last_step !== null && (from === null || r.last_step > from))) {
          const windows = await this.store.windows(r.id, from === null ? {} : { after: from });
          for (const w of windows) this.hub.publishWindow(w);
          const last = windows.at(-1)?.step ?? r.last_step;
          if (last !== null) s.lastStep = Math.max(s.lastStep ?? -Infinity, last);
        }
        if (this.stopped) return;
        // A run followed since the last poll starts from its first marker, since some may have been stored after
        // a viewer's backfill; the hub sends each viewer only those it does not have.
        s.markerCursor = cursor;
        for (const m of markers) this.hub.publishMarker(m);
      }
    } catch (e) {
      if (!this.stopped) this.onError(e);
    }
  }

  /** Stops polling; resolves once a poll in progress has finished, so the store can be closed after it. */
  async stop(): Promise<void> {
    this.stopped = true;
    if (this.timer !== null) clearInterval(this.timer);
    this.timer = null;
    const stop = await this.unlisten;
    await stop?.();
    await this.current;
  }
}
