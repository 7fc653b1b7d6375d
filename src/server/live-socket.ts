/**
 * `/live`: a viewer subscribes to the runs list or to a run (answered with a backfill of its stored windows
 * and markers, then followed through the hub), and unsubscribes again.
 */
import { Ajv } from 'ajv';
import type { WebSocket } from 'ws';
import { TidemarkError } from '../errors.js';
import type { BackfillMessage } from '../protocol/messages.js';
import { markerKey } from '../protocol/records.js';
import type { ServerContext } from './context.js';
import type { Viewer } from './live.js';
import { viewerSchema } from './schemas.js';
import { parseFrame, replyError } from './socket-frames.js';
import { summaryOf } from './watcher.js';

/** The live endpoint: returns what takes a viewer's connection, already upgraded. The hub ends them all. */
export function liveSocket(ctx: ServerContext): (ws: WebSocket) => void {
  const { store, hub, watcher } = ctx;
  const validateViewer = viewerSchema(new Ajv({ allErrors: false }));

  const forget = (viewer: Viewer, runId: string): void => {
    viewer.runs.delete(runId);
    viewer.lastStep.delete(runId);
    viewer.markerKeys.delete(runId);
    viewer.behind.delete(runId);
    viewer.lean.delete(runId);
  };

  const backfill = async (viewer: Viewer, ref: string, points: number, after: number | null, variables: boolean): Promise<void> => {
    const run = await store.resolveRun(ref);
    const windows = await store.windows(run.id, { points, variables, ...(after !== null ? { after } : {}) });
    const markers = await store.markers(run.id);
    const message: BackfillMessage = {
      v: 1,
      type: 'backfill',
      run: { ...summaryOf(run), config: run.config, layers: run.layers },
      windows,
      total_windows: run.windows,
      markers,
    };
    forget(viewer, run.id);
    viewer.runs.add(run.id);
    if (!variables) viewer.lean.add(run.id);
    viewer.lastStep.set(run.id, windows.at(-1)?.step ?? after);
    viewer.markerKeys.set(run.id, new Set(markers.map(markerKey)));
    if (!hub.send(viewer, message)) viewer.behind.set(run.id, after);
    // What was stored while the backfill was read (and published before this viewer followed the run) comes
    // with the next poll: the watcher reads from the earliest step its viewers have, and all markers again.
    watcher.resync(run.id);
  };

  return (ws: WebSocket): void => {
    const viewer = hub.add(ws);
    // A viewer's requests are answered in the order they came (a subscribe, then its unsubscribe).
    let chain: Promise<void> = Promise.resolve();
    ws.on('message', (data, isBinary) => {
      let msg: unknown;
      try {
        msg = parseFrame(data, isBinary);
      } catch (e) {
        return replyError(ctx, ws, e);
      }
      if (!validateViewer(msg)) {
        const why = validateViewer.errors?.[0];
        return replyError(ctx, ws, new TidemarkError('TIDEMARK_ERR_MESSAGE_INVALID', `Not a v1 viewer message: ${why?.instancePath || '(message)'} ${why?.message ?? ''}.`));
      }
      const request = msg;
      chain = chain.then(async () => {
        try {
          if (request.type === 'subscribe-runs') {
            viewer.runsList = true;
            hub.send(viewer, { v: 1, type: 'runs', runs: (await store.runs()).map(summaryOf) });
          } else if (request.type === 'unsubscribe') {
            if (request.run === undefined) viewer.runsList = false;
            else forget(viewer, request.run);
          } else {
            await backfill(viewer, request.run, request.points ?? 500, request.after ?? null, request.variables ?? true);
          }
        } catch (e) {
          replyError(ctx, ws, e, request.type === 'subscribe' ? { run: request.run } : {});
        }
      });
    });
    ws.on('error', () => ws.terminate());
  };
}
