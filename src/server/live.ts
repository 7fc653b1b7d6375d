/**
 * Viewers of the live stream (`/live`): who follows which run, what they are sent, and how a slow or dead
 * viewer is kept from growing the server's memory. A message to a viewer whose socket buffer is over the
 * limit is dropped; once the buffer drains the viewer gets a `gap` message and fetches what it missed.
 */
import type { WebSocket } from 'ws';
import { markerKey, withoutVariables, type Marker, type WindowRecord } from '../protocol/records.js';
import type { LiveMessage, RunSummary } from '../protocol/messages.js';
import { encodeJson } from '../storage/sink.js';

export interface Viewer {
  ws: WebSocket;
  runs: Set<string>;
  runsList: boolean;
  alive: boolean;
  /** Runs whose messages were dropped, with the last step this viewer was sent for each. */
  behind: Map<string, number | null>;
  /** Last window step sent per followed run: a window at or before it is not sent again. */
  lastStep: Map<string, number | null>;
  /** Markers sent per followed run (the backfill's included), so none is sent twice. */
  markerKeys: Map<string, Set<string>>;
  /** Followed runs whose windows this viewer takes without per-variable statistics. */
  lean: Set<string>;
}


export interface LiveCounters {
  viewers: number;
  sent: number;
  dropped: number;
}

export class LiveHub {
  private readonly viewers = new Set<Viewer>();
  private readonly bufferLimit: number;
  private timer: NodeJS.Timeout | null = null;
  readonly counters = { sent: 0, dropped: 0 };

  constructor(options: { bufferLimit: number; heartbeatMs: number }) {
    this.bufferLimit = options.bufferLimit;
    // A viewer that does not answer a ping by the next round is gone (sleep, lost network): end it.
    this.timer = setInterval(() => {
      for (const v of this.viewers) {
        if (!v.alive) {
          v.ws.terminate();
          this.viewers.delete(v);
          continue;
        }
        v.alive = false;
        try {
          v.ws.ping();
        } catch {
          // A socket closing under us: the close event removes it.
        }
      }
    }, options.heartbeatMs);
    this.timer.unref();
  }

  get size(): number {
    return this.viewers.size;
  }

  add(ws: WebSocket): Viewer {
    const v: Viewer = { ws, runs: new Set(), runsList: false, alive: true, behind: new Map(), lastStep: new Map(), markerKeys: new Map(), lean: new Set() };
    this.viewers.add(v);
    ws.on('pong', () => {
      v.alive = true;
    });
    ws.on('close', () => this.viewers.delete(v));
    return v;
  }

  /** Whether anyone follows this run (the watcher reads windows only for followed runs). */
  following(runId: string): boolean {
    for (const v of this.viewers) if (v.runs.has(runId)) return true;
    return false;
  }

  followedRuns(): Set<string> {
    const out = new Set<string>();
    for (const v of this.viewers) for (const r of v.runs) out.add(r);
    return out;
  }

  /**
   * The earliest last step sent of this run over the viewers that follow it and are not behind (those fetch
   * what they missed themselves after a gap); null when one of them has no window yet.
   */
  earliestStep(runId: string): number | null {
    let out: number | null = null;
    for (const v of this.viewers) {
      if (!v.runs.has(runId) || v.behind.has(runId)) continue;
      const last = v.lastStep.get(runId) ?? null;
      if (last === null) return null;
      out = out === null ? last : Math.min(out, last);
    }
    return out;
  }

  /**
   * Sends to one viewer, unless its buffer is over the limit; returns whether it was sent. A message
   * published to many viewers comes already encoded, once.
   */
  send(v: Viewer, message: LiveMessage | string): boolean {
    if (v.ws.readyState !== v.ws.OPEN) return false;
    if (v.ws.bufferedAmount > this.bufferLimit) {
      this.counters.dropped++;
      return false;
    }
    v.ws.send(typeof message === 'string' ? message : encodeJson(message));
    this.counters.sent++;
    return true;
  }

  publishWindow(window: WindowRecord): void {
    // Encoded at most twice, with and without per-variable statistics, whatever the number of viewers.
    let full: string | null = null;
    let lean: string | null = null;
    for (const v of this.viewers) {
      if (!v.runs.has(window.run)) continue;
      const last = v.lastStep.get(window.run) ?? null;
      if (last !== null && window.step <= last) continue;
      if (!this.catchUp(v, window.run)) continue;
      const text = v.lean.has(window.run)
        ? (lean ??= encodeJson({ v: 1, type: 'window', window: withoutVariables(window) } satisfies LiveMessage))
        : (full ??= encodeJson({ v: 1, type: 'window', window } satisfies LiveMessage));
      if (this.send(v, text)) v.lastStep.set(window.run, window.step);
      else v.behind.set(window.run, v.lastStep.get(window.run) ?? null);
    }
  }

  publishMarker(marker: Marker): void {
    let text: string | null = null;
    for (const v of this.viewers) {
      if (!v.runs.has(marker.run)) continue;
      const key = markerKey(marker);
      let keys = v.markerKeys.get(marker.run);
      if (keys === undefined) v.markerKeys.set(marker.run, (keys = new Set()));
      if (keys.has(key)) continue;
      if (!this.catchUp(v, marker.run)) continue;
      text ??= encodeJson({ v: 1, type: 'marker', marker } satisfies LiveMessage);
      if (this.send(v, text)) keys.add(key);
      else v.behind.set(marker.run, v.lastStep.get(marker.run) ?? null);
    }
  }

  publishRun(row: RunSummary): void {
    const text = encodeJson({ v: 1, type: 'runs', runs: [row] } satisfies LiveMessage);
    for (const v of this.viewers) if (v.runsList) this.send(v, text);
  }

  /** A viewer that fell behind on a run first gets a gap message (once its buffer has drained). */
  private catchUp(v: Viewer, runId: string): boolean {
    if (!v.behind.has(runId)) return true;
    const after = v.behind.get(runId) ?? null;
    if (!this.send(v, { v: 1, type: 'gap', run: runId, after_step: after })) return false;
    v.behind.delete(runId);
    return true;
  }

  close(): void {
    if (this.timer !== null) clearInterval(this.timer);
    this.timer = null;
    for (const v of this.viewers) v.ws.terminate();
    this.viewers.clear();
  }
}
