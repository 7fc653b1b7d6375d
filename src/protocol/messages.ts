/**
 * The WebSocket protocol between training processes, the server and viewers (docs/protocol.md). Every
 * message is one JSON text frame with a protocol version `v` and a `type`. Version 1.
 */
import type { Marker, RunInfo, RunStatus, SinkRecord, WindowRecord } from './records.js';

export const PROTOCOL_VERSION = 1;

/** Largest frame the server reads, bytes; a writer splits its batches below it. */
export const MAX_FRAME_BYTES = 4 * 1024 * 1024;

// ---------------------------------------------------------------------------------------------
// /ingest: a remote writer and the server

/** Writer → server: records of one run, numbered from 0 without gaps per run and connection-independent. */
export interface BatchMessage {
  v: 1;
  type: 'batch';
  run: string;
  seq: number;
  records: SinkRecord[];
}

/** Server → writer: batch `seq` of `run` is stored (now, or already before: `duplicate`). */
export interface AckMessage {
  v: 1;
  type: 'ack';
  run: string;
  seq: number;
  duplicate: boolean;
}

/** Server → writer or viewer: a message was refused. `seq` names the refused batch, when known. */
export interface ErrorMessage {
  v: 1;
  type: 'error';
  code: string;
  message: string;
  run?: string;
  seq?: number;
  /** Whether sending the same message again later can succeed (e.g. the store was busy). */
  retry: boolean;
}

export type IngestMessage = BatchMessage;
export type IngestReply = AckMessage | ErrorMessage;

// ---------------------------------------------------------------------------------------------
// /live: viewers

/** Viewer → server: follow one run. The server answers with a backfill, then every new window and marker. */
export interface SubscribeMessage {
  v: 1;
  type: 'subscribe';
  run: string;
  /** Windows at most in the backfill, spread evenly over the run (first and last kept). Default 500. */
  points?: number;
  /** Only windows after this step in the backfill (a reconnecting viewer asks for what it missed). */
  after?: number;
  /**
   * false: windows (in the backfill and live) come without each layer's per-variable statistics, a third of
   * the size for a model of dense layers. Default true.
   */
  variables?: boolean;
}

/** Viewer → server: follow the list of runs (new runs, status changes). */
export interface SubscribeRunsMessage {
  v: 1;
  type: 'subscribe-runs';
}

export interface UnsubscribeMessage {
  v: 1;
  type: 'unsubscribe';
  /** The run to stop following; absent: stop following the list of runs. */
  run?: string;
}

export type ViewerMessage = SubscribeMessage | SubscribeRunsMessage | UnsubscribeMessage;

/** A run as a row of the runs list (the store's RunRow adds what only it needs). */
export interface RunSummary {
  id: string;
  name: string;
  group: string | null;
  tags: Record<string, string>;
  status: RunStatus;
  /** ms since the epoch. */
  created_at: number;
  ended_at: number | null;
  /** Last step stored, or null before the first window. */
  last_step: number | null;
  windows: number;
}

/** Server → viewer: the state of a run when the viewer subscribed. */
export interface BackfillMessage {
  v: 1;
  type: 'backfill';
  run: RunSummary & { config: Record<string, unknown>; layers: RunInfo['layers'] };
  /** Evenly thinned windows (all of them when the run has at most `points`). */
  windows: WindowRecord[];
  /** Windows the run holds in all; more than `windows.length` when thinned. */
  total_windows: number;
  markers: Marker[];
}

export interface WindowMessage {
  v: 1;
  type: 'window';
  window: WindowRecord;
}

export interface MarkerMessage {
  v: 1;
  type: 'marker';
  marker: Marker;
}

/** Server → viewer: the runs list, in full on subscribe and then one changed row at a time. */
export interface RunsMessage {
  v: 1;
  type: 'runs';
  runs: RunSummary[];
}

/**
 * Server → viewer: messages for `run` were dropped because the viewer read too slowly. Fetch the windows
 * after `after_step` over HTTP (or subscribe again with `after`) to fill the gap.
 */
export interface GapMessage {
  v: 1;
  type: 'gap';
  run: string;
  after_step: number | null;
}

export type LiveMessage = BackfillMessage | WindowMessage | MarkerMessage | RunsMessage | GapMessage | ErrorMessage;
