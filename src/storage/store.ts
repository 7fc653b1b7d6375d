/**
 * The Store: a durable home for runs, their window statistics as series, and their markers.
 * The SQLite implementation (sqlite-store.ts) is the default; readers (CLI, server) use only this
 * interface. Writes are synchronous and batched: one transaction per call of `append`.
 */
import type { RunSummary } from '../protocol/messages.js';
import type { LayerInfo, Marker, RunInfo, RunStatus, SinkRecord, WindowRecord } from '../protocol/records.js';

export interface WindowQuery {
  /** Only windows whose step is greater. Default: from the start. */
  after?: number;
  /** Inclusive step range (with `after`, both bounds apply). Default: the whole run. */
  from?: number;
  to?: number;
  /** At most this many windows (an integer ≥ 2), spread evenly over those selected, the first and last kept. Default: all. */
  points?: number;
  /** false: leave out each layer's per-variable statistics (`layers[name].variables`). Default true. */
  variables?: boolean;
}

/** A run as the store lists it: the row of the runs list viewers see, plus what the store keeps about it. */
export interface RunRow extends RunSummary {
  /** Step of the `end` record, or null while no end record was stored. */
  end_step: number | null;
  /** Last time the writer showed it was alive; a running run whose heartbeat is older than the limit is `interrupted`. */
  heartbeat_at: number;
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
  /**
   * A layer name, or a variable name (as seriesKeys lists it) for per-variable statistics; omitted or
   * null for the network entry, or else the run-level metric of that name (loss, val_loss, snr_floor, …).
   */
  layer?: string | null;
  /** Inclusive step range. */
  from?: number;
  to?: number;
  /** At most this many points (an integer ≥ 2), downsampled with Largest-Triangle-Three-Buckets (Steinarsson 2013). */
  points?: number;
  /** Only the newest this many points of the range (an integer ≥ 1), still in step order. Default: all. */
  last?: number;
}

export interface SeriesPoint {
  step: number;
  value: number;
}

/**
 * Where a series belongs: the whole network, one layer, one trainable variable of a layer, or the run
 * (what `fit` logged, and the window fields snr_floor, epoch and batch_size).
 */
export type SeriesScope = 'network' | 'layer' | 'variable' | 'run';

export interface SeriesKey {
  metric: string;
  /** The layer's name, or the variable's name for scope `variable`; null for the network and run scopes. */
  layer: string | null;
  scope: SeriesScope;
}

/** A stored `warning` record. */
export interface StoredWarning {
  run: string;
  code: string;
  message: string;
  step: number | null;
  time: number;
}

export interface Store {
  readonly path: string;
  /** True when opened read-only: every write throws TIDEMARK_ERR_STORE_READONLY. */
  readonly readonly: boolean;
  /** Creates the run (status `running`). Idempotent for the same id. */
  beginRun(run: RunInfo): void;
  /**
   * Stores records in one transaction: windows (every numeric metric of every layer, the network entry
   * and the logs, plus the window's own fields), markers, warnings and `end` records. A window already
   * stored for (run, index) is ignored, so a resend never doubles a point; so is a marker already stored
   * for (run, layer, kind, step, detected_step), and a warning for (run, time, code, message).
   * On any error nothing of the call is kept.
   */
  append(records: readonly SinkRecord[]): void;
  /**
   * Stores batch `seq` of a remote writer of `runId` in one transaction, once: a batch already stored
   * under (runId, seq) is not written again and comes back `{ duplicate: true }`. Every record must
   * belong to `runId`; the run must exist once the batch is stored (its first batch carries the run).
   */
  appendBatch(runId: string, seq: number, records: readonly SinkRecord[]): { duplicate: boolean };
  /** Marks the writer of `runId` alive at `now` (default: the store's clock); an `interrupted` run without an end record becomes `running` again. */
  heartbeat(runId: string, now?: number): void;
  runs(filter?: RunFilter): RunRow[];
  /** Finds a run by id, unique id prefix or exact name; throws TIDEMARK_ERR_RUN_NOT_FOUND / TIDEMARK_ERR_RUN_AMBIGUOUS. */
  resolveRun(ref: string): RunDetail;
  /** Which series a run has. */
  seriesKeys(runId: string): SeriesKey[];
  /** Points in step order; NaN values come back as NaN; an unknown metric gives []. */
  series(runId: string, metric: string, query?: SeriesQuery): SeriesPoint[];
  /** In step order. */
  markers(runId: string): Marker[];
  /**
   * The markers stored after `cursor`, in the order they were stored, and the cursor to pass next time (0 reads
   * them all). For followers that poll: each call reads only what is new.
   */
  markersSince(runId: string, cursor: number): { markers: Marker[]; cursor: number };
  /** In time order. */
  warnings(runId: string): StoredWarning[];
  /**
   * The run's windows rebuilt from storage, in step order (for export and offline analysis); with a query,
   * only those after a step, and/or at most `points` of them spread evenly (first and last kept).
   */
  windows(runId: string, query?: WindowQuery): WindowRecord[];
  deleteRun(runId: string): boolean;
  /** Deletes runs created before `before` (ms since the epoch), except live ones (running, fresh heartbeat); returns their ids. */
  prune(before: number): string[];
  close(): void;
}
