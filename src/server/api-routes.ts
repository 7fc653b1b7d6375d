/**
 * The HTTP API: runs, a run's series, windows, markers and export under `/api/…` (a JSON schema per route,
 * unknown query parameters refused), and `/metrics` in the OpenMetrics text format.
 */
import type { FastifyPluginAsync } from 'fastify';
import { closestName } from '../option-check.js';
import { TidemarkError } from '../errors.js';
import { exportRun, type ExportFormat } from '../storage/export.js';
import { GROUP_ALIGNS, groupReport, sweepOf, SWEEP_OUTCOMES, type GroupAlign, type SweepOutcome } from '../storage/group-report.js';
import type { RunFilter, SeriesKey, WindowQuery } from '../storage/store.js';
import type { ServerContext } from './context.js';
import { metricsText } from './metrics.js';
import { badRequest } from './public-error.js';

export type ApiRoutesOptions = {
  ctx: ServerContext;
  /** /metrics shows running runs and those that ended within this many ms. */
  recentMs: number;
};

/** Refuses a metric, or a metric and layer, that the run has no series for (a run with no series yet: nothing to say). */
function checkSeriesKey(keys: readonly SeriesKey[], metric: string, layer: string | null): void {
  if (keys.length === 0) return;
  if (!keys.some((k) => k.metric === metric)) {
    const metrics = [...new Set(keys.map((k) => k.metric))].sort();
    const best = closestName(metric, metrics);
    throw badRequest(`Query parameter 'metric': this run has no series '${metric}'.${best !== null ? ` Did you mean '${best}'?` : ''} Its metrics: ${metrics.join(', ')}.`);
  }
  if (!keys.some((k) => k.metric === metric && k.layer === layer)) {
    const layers = keys.filter((k) => k.metric === metric).map((k) => (k.layer === null ? '(none: the network)' : k.layer));
    throw badRequest(`Query parameter 'layer': '${metric}' has no series for ${layer === null ? 'the network' : `layer '${layer}'`}. It has: ${layers.join(', ')}.`);
  }
}

/** `from` after `to` selects nothing by construction: a caller's mistake, said as such. */
function checkRange(from: number | undefined, to: number | undefined): void {
  if (from !== undefined && to !== undefined && from > to) {
    throw badRequest(`Query parameters 'from' (${from}) and 'to' (${to}): from must not be greater than to.`);
  }
}

/** `/api/…` and `/metrics`. Errors go to the server's error handler, which answers them with their code. */
export const apiRoutes: FastifyPluginAsync<ApiRoutesOptions> = async (app, { ctx, recentMs }) => {
  const { store } = ctx;
  const idParams = { type: 'object', properties: { id: { type: 'string', minLength: 1, maxLength: 200 } }, required: ['id'] } as const;
  const queryOf = (props: Record<string, unknown>) => ({ type: 'object', properties: { token: { type: 'string' }, ...props }, additionalProperties: false });

  // Groups of runs (issue 15): the names with their run counts, and one group read together.
  app.get('/api/groups', { schema: { querystring: queryOf({}) } }, async () => {
    const counts = new Map<string, number>();
    for (const r of await store.runs({ limit: 100_000 })) if (r.group !== null) counts.set(r.group, (counts.get(r.group) ?? 0) + 1);
    return [...counts].sort(([a], [b]) => a.localeCompare(b)).map(([group, runs]) => ({ group, runs }));
  });
  const nameParams = { type: 'object', properties: { name: { type: 'string', minLength: 1, maxLength: 1000 } }, required: ['name'] } as const;
  app.get(
    '/api/groups/:name',
    {
      schema: {
        params: nameParams,
        querystring: queryOf({
          sweep: { type: 'string', minLength: 1, maxLength: 200 },
          outcome: { type: 'string', enum: [...SWEEP_OUTCOMES] },
          align: { type: 'string', enum: [...GROUP_ALIGNS] },
          lossTarget: { type: 'number', exclusiveMinimum: 0 },
          points: { type: 'integer', minimum: 2, maximum: 200 },
        }),
      },
    },
    async (req) => {
      const name = (req.params as { name: string }).name;
      const q = req.query as { sweep?: string; outcome?: SweepOutcome; align?: GroupAlign; lossTarget?: number; points?: number };
      const report = await groupReport(store, name, {
        ...(q.align !== undefined && { align: q.align }),
        ...(q.lossTarget !== undefined && { lossTarget: q.lossTarget }),
        ...(q.points !== undefined && { gridPoints: q.points }),
      });
      if (report === null) throw new TidemarkError('TIDEMARK_ERR_RUN_NOT_FOUND', `No run is in group ${JSON.stringify(name)}.`);
      // The same numbers as `tidemark group NAME --sweep TAG`.
      return { ...report, sweep: q.sweep === undefined ? null : sweepOf(report, q.sweep, q.outcome ?? 'diffusion-start') };
    },
  );

  app.get(
    '/api/runs',
    {
      schema: {
        querystring: queryOf({
          name: { type: 'string', maxLength: 1000 },
          group: { type: 'string', maxLength: 1000 },
          tag: { type: 'string', maxLength: 1000, pattern: '^[^=]+=.*$' },
          status: { type: 'string', enum: ['running', 'finished', 'failed', 'interrupted'] },
          limit: { type: 'integer', minimum: 1, maximum: 10000 },
        }),
      },
    },
    async (req) => {
      const q = req.query as { name?: string; group?: string; tag?: string; status?: RunFilter['status']; limit?: number };
      const filter: RunFilter = {};
      if (q.name !== undefined) filter.name = q.name;
      if (q.group !== undefined) filter.group = q.group;
      if (q.status !== undefined) filter.status = q.status;
      if (q.limit !== undefined) filter.limit = q.limit;
      if (q.tag !== undefined) {
        const i = q.tag.indexOf('=');
        filter.tags = { [q.tag.slice(0, i)]: q.tag.slice(i + 1) };
      }
      return store.runs(filter);
    },
  );

  app.get('/api/runs/:id', { schema: { params: idParams, querystring: queryOf({}) } }, async (req) => await store.resolveRun((req.params as { id: string }).id));

  app.get(
    '/api/runs/:id/series',
    {
      schema: {
        params: idParams,
        querystring: {
          ...queryOf({
            metric: { type: 'string', minLength: 1, maxLength: 200 },
            layer: { type: 'string', minLength: 1, maxLength: 1000 },
            from: { type: 'number' },
            to: { type: 'number' },
            points: { type: 'integer', minimum: 2, maximum: 100000 },
          }),
          required: ['metric'],
        },
      },
    },
    async (req) => {
      const run = await store.resolveRun((req.params as { id: string }).id);
      const q = req.query as { metric: string; layer?: string; from?: number; to?: number; points?: number };
      checkRange(q.from, q.to);
      const points = await store.series(run.id, q.metric, {
        layer: q.layer ?? null,
        ...(q.from !== undefined ? { from: q.from } : {}),
        ...(q.to !== undefined ? { to: q.to } : {}),
        ...(q.points !== undefined ? { points: q.points } : {}),
      });
      // Only an empty answer needs the run's series listed: to tell an unknown metric or layer (a caller's
      // mistake, 400 per docs/protocol.md) from a known series with no points in the range.
      if (points.length === 0) checkSeriesKey(await store.seriesKeys(run.id), q.metric, q.layer ?? null);
      return { run: run.id, metric: q.metric, layer: q.layer ?? null, points };
    },
  );

  app.get(
    '/api/runs/:id/windows',
    {
      schema: {
        params: idParams,
        querystring: queryOf({
          after: { type: 'number' },
          from: { type: 'number' },
          to: { type: 'number' },
          points: { type: 'integer', minimum: 2, maximum: 100000 },
          variables: { type: 'boolean' },
        }),
      },
    },
    async (req) => {
      const run = await store.resolveRun((req.params as { id: string }).id);
      const q = req.query as { after?: number; from?: number; to?: number; points?: number; variables?: boolean };
      checkRange(q.from, q.to);
      const query: WindowQuery = {};
      for (const key of ['after', 'from', 'to', 'points'] as const) if (q[key] !== undefined) query[key] = q[key];
      if (q.variables !== undefined) query.variables = q.variables;
      return await store.windows(run.id, query);
    },
  );

  app.get('/api/runs/:id/markers', { schema: { params: idParams, querystring: queryOf({}) } }, async (req) => {
    const run = await store.resolveRun((req.params as { id: string }).id);
    return await store.markers(run.id);
  });

  app.get(
    '/api/runs/:id/export',
    { schema: { params: idParams, querystring: { ...queryOf({ format: { type: 'string', enum: ['csv', 'jsonl'] } }), required: ['format'] } } },
    async (req, reply) => {
      const run = await store.resolveRun((req.params as { id: string }).id);
      const format = (req.query as { format: ExportFormat }).format;
      const body = await exportRun(store, run.id, format);
      const safeName = run.name.replace(/[^A-Za-z0-9._-]+/g, '_').slice(0, 100) || run.id;
      return reply
        .type(format === 'csv' ? 'text/csv; charset=utf-8' : 'application/jsonl; charset=utf-8')
        .header('content-disposition', `attachment; filename="${safeName}.${format}"`)
        .send(body);
    },
  );

  app.get('/metrics', { schema: { querystring: queryOf({}) } }, async (req, reply) => {
    const state = { now: ctx.now(), recentMs, counters: ctx.counters, viewers: ctx.hub.size };
    const { contentType, text } = await metricsText(store, state, req.headers.accept ?? '');
    return reply.type(contentType).send(text);
  });
};
