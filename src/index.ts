/**
 * tidemark's public API. Nothing outside what this file exports is public.
 */
export { monitor } from './callback/monitor.js';
export type { Monitor, MonitorCallback, PhaseState } from './callback/monitor.js';
export type { MonitorOptions, WindowSetting, AccumulatorKind } from './callback/options.js';
export { defaultStore } from './callback/options.js';
export { TidemarkError, TidemarkTypeError, TidemarkRangeError, ERROR_CODES } from './errors.js';
export type { ErrorCode, MonitorWarning } from './errors.js';
export type {
  LayerStats,
  VariableStats,
  WindowRecord,
  Marker,
  MarkerKind,
  Phase,
  RunInfo,
  RunStatus,
  LayerInfo,
  SinkRecord,
} from './protocol/records.js';
export type { Sink } from './storage/sink.js';
export { MemorySink } from './storage/memory-sink.js';
export { JsonlSink, type JsonlSinkOptions } from './storage/jsonl-sink.js';
export { encodeRecord, decodeRecord } from './storage/sink.js';
export * as analysis from './analysis/index.js';
export { openStore, type StoreOptions } from './storage/sqlite-store.js';
export type {
  Store,
  RunRow,
  RunDetail,
  RunFilter,
  SeriesQuery,
  SeriesPoint,
  SeriesKey,
  SeriesScope,
  StoredWarning,
  WindowQuery,
} from './storage/store.js';
export type { AsyncStore, AnyStore } from './storage/async-store.js';
export { connectStore, type ConnectOptions } from './storage/connect-store.js';
export { openPostgresStore, type PostgresStoreOptions } from './storage/postgres-store.js';
export { StoreSink, type StoreSinkOptions } from './storage/store-sink.js';
export { exportRun, importJsonl, type ExportFormat, type ImportReport } from './storage/export.js';
export {
  groupReport,
  sweepOf,
  matchLayers,
  GROUP_ALIGNS,
  SWEEP_OUTCOMES,
  type GroupAlign,
  type GroupOptions,
  type GroupReport,
  type GroupLayerReport,
  type GroupRunOutcome,
  type SweepOutcome,
  type SweepReport,
} from './storage/group-report.js';
export { RemoteSink, type RemoteSinkOptions } from './storage/remote-sink.js';
export { resendSpill, type ResendOptions, type ResendReport } from './storage/resend.js';
export { startServer, DEFAULT_PORT, type StartOptions, type RunningServer } from './server/serve.js';
export { buildServer, type ServerOptions, type TidemarkServer, type ServerCounters } from './server/app.js';
export type { ProbeOptions } from './callback/probe.js';
export * from './protocol/messages.js';
