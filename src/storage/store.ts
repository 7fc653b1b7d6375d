/**
 * The Store: a durable home for runs, their window statistics as series, and their markers.
 * The SQLite implementation (sqlite-store.ts) is the default; readers (CLI, server) use only this
 * interface. Writes are synchronous and batched: one transaction per call of `append`.
 */
import type { LayerInfo, Marker, RunInfo, RunStatus, SinkRecord, WindowRecord } from '../protocol/records.js';

export interface RunRow {
  id: string;
  name: string;
  group: string | null;
  tags: Record<string, string>;
  status: RunStatus;
  /** ms since the epoch. */
  created_at: number;
  ended_at: number | null;
  /** Last time the writer showed it was alive; a running run whose heartbeat is older than the limit is `interrupted`. */
  heartbeat_at: number;
  /** Last step stored, or null before the first window. */
  last_step: number | null;
  windows: number;
  config: Record<string, unknown>;
}

export interface RunDetail extends RunRow {
  layers: LayerInfo[];
}

export interface RunFilter {
  /** Substring of the name. */
  name?: string;
  group?: string;
  /** Every given tag must match exactly. */
  tags?: Record<string, string>;
  status?: RunStatus;
  /** Newest first; default 1000. */
  limit?: number;
}

export interface SeriesQuery {
  /** A layer name; omitted or null for the network entry; run-level metrics (loss, val_loss, …) ignore it. */
  layer?: string | null;
  /** Inclusive step range. */
  from?: number;
  to?: number;
  /** At most this many points, downsampled with Largest-Triangle-Three-Buckets (Steinarsson 2013). */
  points?: number;
}

export interface SeriesPoint {
  step: number;
  value: number;
}

export interface SeriesKey {
  metric: string;
  /** null for the network entry and for run-level metrics. */
  layer: string | null;
}

export interface Store {
  readonly path: string;
  /** Creates the run (status `running`). Idempotent for the same id. */
  beginRun(run: RunInfo): void;
  /**
   * Stores records in one transaction: windows (every numeric metric of every layer, the network entry
   * and the logs, plus the window's own fields), markers, warnings and `end` records. A window already
   * stored for (run, index) is ignored, so a resend never doubles a point.
   */
  append(records: readonly SinkRecord[]): void;
  /** Marks the writer of `runId` alive at `now`. */
  heartbeat(runId: string, now?: number): void;
  runs(filter?: RunFilter): RunRow[];
  /** Finds a run by id, unique id prefix or exact name; throws TIDEMARK_ERR_RUN_NOT_FOUND / TIDEMARK_ERR_RUN_AMBIGUOUS. */
  resolveRun(ref: string): RunDetail;
  /** Which series a run has. */
  seriesKeys(runId: string): SeriesKey[];
  series(runId: string, metric: string, query?: SeriesQuery): SeriesPoint[];
  markers(runId: string): Marker[];
  /** The run's windows rebuilt from storage, in step order (for export and offline analysis). */
  windows(runId: string): WindowRecord[];
  deleteRun(runId: string): boolean;
  /** Deletes runs created before `before` (ms since the epoch); returns their ids. */
  prune(before: number): string[];
  close(): void;
}
