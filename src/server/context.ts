/**
 * What the parts of the server share: one store, one live hub and its watcher, one set of counters, and one
 * way of refusing a request, so every route and socket answers errors alike and `/metrics` counts them all.
 */
import type { FastifyReply } from 'fastify';
import type { AsyncStore } from '../storage/async-store.js';
import type { LiveHub } from './live.js';
import type { StoreWatcher } from './watcher.js';

export interface ServerCounters {
  /** Numeric values stored from ingested windows. */
  pointsIngested: number;
  batchesIngested: number;
  duplicateBatches: number;
  /** Messages and requests refused, by error code. */
  rejected: Map<string, number>;
}

export interface ServerContext {
  store: AsyncStore;
  hub: LiveHub;
  watcher: StoreWatcher;
  counters: ServerCounters;
  now: () => number;
  /** Told about internal failures; clients only see a code. */
  onError: (e: unknown) => void;
  /** Counts one refusal under its code. */
  reject: (code: string) => void;
  /** Answers an HTTP request with a public error (see publicError), counted and, if internal, reported. */
  sendError: (reply: FastifyReply, e: unknown) => FastifyReply;
}
