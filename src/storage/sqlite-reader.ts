/**
 * The read path of the SQLite store: each call reads in one snapshot. Options arrive checked, and
 * guards and the wrapping of failures stay with SqliteStore.
 */
import type { LayerInfo, Marker, WindowRecord } from '../protocol/records.js';
import { decodeJson } from '../protocol/json-codec.js';
import { runsQuery, type PointRow, type Statements, type Stmt } from './sqlite-statements.js';
import type { SqliteConnection } from './sqlite-open.js';
import {
  ambiguousRun,
  assembleWindows,
  checkRunId,
  downsample,
  markerOf,
  num,
  runNotFound,
  runRefNotFound,
  thinEvenly,
  toRunRow,
  WINDOW_SERIES,
  type CheckedFilter,
  type CheckedSeriesQuery,
  type CheckedWindowQuery,
  type RunDbRow,
  type WindowDbRow,
  type WindowSeries,
} from './store-reading.js';
import type { RunDetail, RunRow, SeriesKey, SeriesPoint, StoredWarning } from './store.js';

type SeriesRead = (from: number, to: number, last?: number) => [number[], (number | null)[]];

export class SqliteReader {
  private readonly s: Statements;
  private readonly dynamic = new Map<string, Stmt<[Record<string, unknown>], RunDbRow>>();

  constructor(private readonly conn: SqliteConnection) {
    this.s = conn.s;
  }

  runs(f: CheckedFilter, cutoff: number): RunRow[] {
    const { sql, params } = runsQuery(f, cutoff);
    return this.conn.inSnapshot(() => this.prepared(sql).all(params).map(toRunRow));
  }

  /** Statements whose text depends on which filters are given: prepared once per shape, then reused. */
  private prepared(sql: string): Stmt<[Record<string, unknown>], RunDbRow> {
    let s = this.dynamic.get(sql);
    if (s === undefined) {
      s = this.conn.db.prepare<Record<string, unknown>, RunDbRow>(sql);
      this.dynamic.set(sql, s);
    }
    return s;
  }

  resolveRun(ref: string, cutoff: number): RunDetail {
    return this.conn.inSnapshot(() => {
      const params = { ref, cutoff };
      const exact = this.s.runById.get(params);
      if (exact !== undefined) return this.detail(exact);
      const found = new Map<string, RunDbRow>();
      if (ref.length >= 4) for (const r of this.s.runsByPrefix.all(params)) found.set(r.id, r);
      for (const r of this.s.runsByName.all(params)) found.set(r.id, r);
      const candidates = [...found.values()];
      if (candidates.length === 1) return this.detail(candidates[0]!);
      if (candidates.length > 1) throw ambiguousRun(ref, candidates);
      const like = this.s.runsLike.all(params);
      throw runRefNotFound(ref, like, like.length > 0 ? [] : this.s.runsRecent.all(params));
    });
  }

  private detail(row: RunDbRow): RunDetail {
    const layers = this.s.layersOf.all(row.id).map(
      (l): LayerInfo => ({ name: l.name, class_name: l.class_name, params: l.params, variables: decodeJson(l.variables) as LayerInfo['variables'] }),
    );
    return { ...toRunRow(row), layers };
  }

  private requireRun(runId: string): void {
    checkRunId(runId);
    if (this.s.runExists.get(runId) === undefined) throw runNotFound(runId);
  }

  seriesKeys(runId: string): SeriesKey[] {
    return this.conn.inSnapshot(() => {
      this.requireRun(runId);
      const keys = this.s.seriesOf.all(runId).map(
        (s): SeriesKey => ({ metric: s.metric, layer: s.scope === 'variable' ? s.variable : s.layer, scope: s.scope }),
      );
      if (this.s.hasWindows.get(runId) !== undefined) {
        const logged = new Set(keys.filter((k) => k.scope === 'run').map((k) => k.metric));
        for (const metric of WINDOW_SERIES) if (!logged.has(metric)) keys.push({ metric, layer: null, scope: 'run' });
      }
      return keys;
    });
  }

  series(runId: string, metric: string, q: CheckedSeriesQuery): SeriesPoint[] {
    return this.conn.inSnapshot(() => {
      const read = this.seriesReader(runId, metric, q.layer);
      if (read === null) return [];
      const [steps, values] = read(q.from, q.to, q.last);
      return downsample(steps, values, q.points);
    });
  }

  /**
   * The statement (taking arg, from, to) that reads one series, or null when the run has no such series.
   * With no layer: the network's metric, else the run-level one (a log, or a window field).
   */
  private seriesReader(runId: string, metric: string, layer: string | null): SeriesRead | null {
    const rows = this.s.seriesFor.all(runId, metric);
    const pick =
      layer === null
        ? (rows.find((r) => r.scope === 'network') ?? rows.find((r) => r.scope === 'run'))
        : (rows.find((r) => r.scope === 'layer' && r.layer === layer) ?? rows.find((r) => r.scope === 'variable' && r.variable === layer));
    if (pick !== undefined) {
      return (from, to, last) => {
        if (last !== undefined) {
          // The newest points only, from the end of the key: a scrape of the latest value reads one row.
          const rows = this.s.lastRange.all(pick.id, from, to, last).reverse();
          return [rows.map((r) => r[0]), rows.map((r) => r[1])];
        }
        return [this.s.stepsRange.all(pick.id, from, to), this.s.valuesRange.all(pick.id, from, to)];
      };
    }
    this.requireRun(runId);
    if (layer === null && (WINDOW_SERIES as readonly string[]).includes(metric)) {
      return (from, to, last) => {
        const all = this.s.windowSeries[metric as WindowSeries].all(runId, from, to);
        const rows = last === undefined ? all : all.slice(-last);
        return [rows.map((r) => r[0]), rows.map((r) => r[1])];
      };
    }
    return null;
  }

  markers(runId: string): Marker[] {
    return this.conn.inSnapshot(() => {
      this.requireRun(runId);
      return this.s.markersOf.all(runId).map((m) => markerOf(runId, m));
    });
  }

  markersSince(runId: string, cursor: number): { markers: Marker[]; cursor: number } {
    return this.conn.inSnapshot(() => {
      this.requireRun(runId);
      const rows = this.s.markersSince.all(runId, cursor);
      return { markers: rows.map((m) => markerOf(runId, m)), cursor: rows.at(-1)?.id ?? cursor };
    });
  }

  warnings(runId: string): StoredWarning[] {
    return this.conn.inSnapshot(() => {
      this.requireRun(runId);
      return this.s.warningsOf.all(runId).map((w) => ({ run: runId, ...w }));
    });
  }

  windows(runId: string, q: CheckedWindowQuery): WindowRecord[] {
    return this.conn.inSnapshot(() => {
      this.requireRun(runId);
      let rows: WindowDbRow[];
      let partial = q.ranged;
      if (q.points !== null) {
        // Thinning reads only the steps first (one integer per window, from the (run, step) index) and then
        // the chosen windows by key: a run of a million windows opens without reading a million rows.
        const steps = this.s.windowStepsRange.all(runId, q.lo, q.hi);
        if (steps.length > q.points) {
          rows = this.s.windowsAt.all(runId, JSON.stringify(thinEvenly(steps, q.points)));
          partial = true;
        } else {
          rows = this.s.windowsRange.all(runId, q.lo, q.hi);
        }
      } else {
        // The windows after a step come from the (run, step) index: a live poll or a scrape reads only what is new.
        rows = q.ranged ? this.s.windowsRange.all(runId, q.lo, q.hi) : this.s.windowsOf.all(runId);
      }
      const stepsJson = JSON.stringify(rows.map((r) => r.step));
      const all = this.s.seriesOf.all(runId);
      // Without the per-variable statistics a wide model's windows are read and sent at a third of the cost.
      const series = q.variables ? all : all.filter((s) => s.scope !== 'variable');
      const values = new Map<number, Map<number, number>>();
      const pointsAll = this.s.pointsAll;
      const pointsAt = this.s.pointsAt;
      for (const s of series) {
        const m = new Map<number, number>();
        // A part of the run reads only its steps, by key; the whole run reads each series in one scan.
        const rowsOf: PointRow[] = partial ? pointsAt.all(s.id, stepsJson) : pointsAll.all(s.id);
        for (const [step, value] of rowsOf) m.set(step, num(value));
        values.set(s.id, m);
      }
      return assembleWindows(runId, rows, series, values);
    });
  }
}
