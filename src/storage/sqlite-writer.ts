/**
 * The write path of the SQLite store: checked records into rows, each call one IMMEDIATE transaction.
 * Guards (closed, read-only) and the wrapping of failures stay with SqliteStore; what this throws is
 * either a coded TidemarkError or SQLite's own error.
 */
import type Database from 'better-sqlite3';
import { TidemarkError } from '../errors.js';
import {
  show,
  type CheckedRecord,
  type EndRowIn,
  type MarkerRowIn,
  type RunRowIn,
  type WarningRowIn,
  type WindowRowIn,
} from './record-check.js';
import { sqliteCode, type SqliteConnection } from './sqlite-open.js';
import type { Statements } from './sqlite-statements.js';
import { runNotFound, stepClash } from './store-reading.js';
import type { SeriesScope } from './store.js';

/** SQLite turns a bound NaN into NULL anyway; saying so keeps the mapping visible. */
function real(x: number): number | null {
  return Number.isNaN(x) ? null : x;
}

/** Series ids of one run, by scope, so a point costs two Map lookups rather than a query. */
interface RunSeriesIds {
  network: Map<string, number>;
  run: Map<string, number>;
  layer: Map<string, Map<string, number>>;
  variable: Map<string, Map<string, number>>;
}

export interface WriterClock {
  now: () => number;
  /** Heartbeats older than this (ms since the epoch) belong to writers that stopped. */
  cutoff: () => number;
}

export class SqliteWriter {
  private readonly s: Statements;
  private readonly seriesIds = new Map<string, RunSeriesIds>();
  /** Series created by the transaction in progress: forgotten again if it rolls back. */
  private created: { runId: string; scope: SeriesScope; owner: string | null; metric: string }[] = [];

  constructor(
    private readonly conn: SqliteConnection,
    private readonly clock: WriterClock,
  ) {
    this.s = conn.s;
  }

  beginRun(run: RunRowIn): void {
    this.atomically(() => this.insertRun(run));
  }

  append(records: readonly CheckedRecord[]): void {
    this.atomically(() => this.appendRecords(records));
  }

  /** Stores batch `seq` of `runId` unless it was stored before; returns whether it was (a resend). */
  appendBatch(runId: string, seq: number, records: readonly CheckedRecord[], count: number): boolean {
    return this.atomically(() => {
      if (this.s.findBatch.get(runId, seq) !== undefined) return true;
      this.appendRecords(records);
      if (this.s.runExists.get(runId) === undefined) {
        throw new TidemarkError('TIDEMARK_ERR_RUN_NOT_FOUND', `appendBatch: run ${show(runId)} is not in the store; its first batch must hold its run record.`);
      }
      this.s.insertBatch.run(runId, seq, count, this.clock.now());
      return false;
    });
  }

  heartbeat(runId: string, now: number): void {
    this.atomically(() => {
      if (this.s.touchRun.run(now, runId).changes === 0) throw runNotFound(runId);
    });
  }

  deleteRun(runId: string): boolean {
    return this.atomically(() => this.deleteOne(runId));
  }

  /** Deletes the runs created before `before`, except live ones; returns their ids. */
  prune(before: number): string[] {
    return this.atomically(() => {
      const ids: string[] = [];
      // A live run (running, heartbeat fresh) is never pruned, however old.
      const rows = this.s.pruneCandidates.all(before, this.clock.cutoff());
      for (const { id } of rows) if (this.deleteOne(id)) ids.push(id);
      return ids;
    });
  }

  /** Drops the series id cache (the store is closing). */
  forget(): void {
    this.seriesIds.clear();
  }

  /** Runs `fn` as one write transaction; on failure nothing of it stays, in the file or in the series cache. */
  private atomically<T>(fn: () => T): T {
    this.created = [];
    try {
      return this.conn.inTransaction(fn);
    } catch (e) {
      for (const c of this.created) this.forgetSeries(c.runId, c.scope, c.owner, c.metric);
      throw e;
    } finally {
      this.created = [];
    }
  }

  private appendRecords(records: readonly CheckedRecord[]): void {
    const now = this.clock.now();
    const touched = new Map<string, { count: number; last: number }>();
    records.forEach((r, i) => {
      switch (r.type) {
        case 'run':
          this.insertRun(r.run);
          break;
        case 'window': {
          const w = r.window;
          if (this.insertWindow(w, i)) {
            const t = touched.get(w.run) ?? { count: 0, last: w.step };
            t.count++;
            t.last = Math.max(t.last, w.step);
            touched.set(w.run, t);
          }
          break;
        }
        case 'marker':
          this.insertMarker(r.marker);
          break;
        case 'warning':
          this.insertWarning(r.warning);
          break;
        case 'end':
          this.endRun(r.end);
          break;
      }
    });
    for (const [runId, t] of touched) this.s.countWindows.run(t.count, t.last, t.last, now, runId);
  }

  private insertRun(run: RunRowIn): void {
    const inserted = this.s.insertRun.run(run.id, run.name, run.group, run.tags, run.started, this.clock.now(), run.config);
    if (inserted.changes === 0) {
      // The same run begun again (a resumed writer): it is alive.
      this.s.touchRun.run(this.clock.now(), run.id);
      return;
    }
    for (const l of run.layers) this.s.insertLayer.run(run.id, l.position, l.name, l.class_name, l.params, l.variables);
  }

  /** Returns false when the window was already stored (a resend). */
  private insertWindow(w: WindowRowIn, i: number): boolean {
    let res: Database.RunResult;
    try {
      res = this.s.insertWindow.run(
        w.run,
        w.index,
        w.first_step,
        w.step,
        w.epoch,
        w.batches,
        w.batch_size,
        w.batches_per_epoch,
        w.pass_batches,
        real(w.snr_floor),
        w.time,
        w.noise,
      );
    } catch (e) {
      const code = sqliteCode(e);
      if (code === 'SQLITE_CONSTRAINT_FOREIGNKEY') throw runNotFound(w.run, 'append');
      if (code === 'SQLITE_CONSTRAINT_UNIQUE') throw stepClash(i, w.index, w.run, w.step);
      throw e;
    }
    if (res.changes === 0) return false;
    const ids = this.idsOf(w.run);
    const insert = this.s.insertPoint;
    for (const p of w.points) {
      const id = this.seriesId(ids, w.run, p.scope, p.layer, p.variable, p.metric);
      if (p.value !== null) insert.run(id, w.step, real(p.value));
    }
    return true;
  }

  private idsOf(runId: string): RunSeriesIds {
    let ids = this.seriesIds.get(runId);
    if (ids === undefined) {
      ids = { network: new Map(), run: new Map(), layer: new Map(), variable: new Map() };
      this.seriesIds.set(runId, ids);
    }
    return ids;
  }

  /** The map of series ids for one (scope, owner); `owner` is the layer or variable name, or null. */
  private mapFor(ids: RunSeriesIds, scope: SeriesScope, owner: string | null, create: boolean): Map<string, number> | undefined {
    if (scope === 'network' || scope === 'run') return ids[scope];
    const byOwner = ids[scope];
    let m = byOwner.get(owner!);
    if (m === undefined && create) {
      m = new Map();
      byOwner.set(owner!, m);
    }
    return m;
  }

  private seriesId(
    ids: RunSeriesIds,
    runId: string,
    scope: SeriesScope,
    layer: string | null,
    variable: string | null,
    metric: string,
  ): number {
    const owner = scope === 'variable' ? variable : layer;
    const m = this.mapFor(ids, scope, owner, true)!;
    const known = m.get(metric);
    if (known !== undefined) return known;
    const found = this.s.findSeries.get(runId, metric, scope, layer ?? '', variable ?? '');
    let id: number;
    if (found !== undefined) id = found.id;
    else {
      id = Number(this.s.insertSeries.run(runId, scope, layer, variable, metric).lastInsertRowid);
      this.created.push({ runId, scope, owner, metric });
    }
    m.set(metric, id);
    return id;
  }

  private forgetSeries(runId: string, scope: SeriesScope, owner: string | null, metric: string): void {
    const ids = this.seriesIds.get(runId);
    if (ids !== undefined) this.mapFor(ids, scope, owner, false)?.delete(metric);
  }

  private insertMarker(m: MarkerRowIn): void {
    try {
      this.s.insertMarker.run(m.run, m.layer, m.kind, real(m.step), real(m.detected_step), real(m.confidence), m.details);
    } catch (e) {
      if (sqliteCode(e) === 'SQLITE_CONSTRAINT_FOREIGNKEY') throw runNotFound(m.run, 'append');
      throw e;
    }
  }

  private insertWarning(w: WarningRowIn): void {
    try {
      this.s.insertWarning.run(w.run, w.code, w.message, w.step, w.time);
    } catch (e) {
      if (sqliteCode(e) === 'SQLITE_CONSTRAINT_FOREIGNKEY') throw runNotFound(w.run, 'append');
      throw e;
    }
  }

  private endRun(e: EndRowIn): void {
    const res = this.s.endRun.run(e.status, e.time, real(e.step), e.run);
    if (res.changes === 0) throw runNotFound(e.run, 'append');
  }

  private deleteOne(runId: string): boolean {
    this.s.deletePoints.run(runId);
    // Layers, series, windows, markers and warnings go with the run (ON DELETE CASCADE).
    const gone = this.s.deleteRun.run(runId).changes > 0;
    this.seriesIds.delete(runId);
    return gone;
  }
}
