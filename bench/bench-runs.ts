/**
 * The runs the server and PostgreSQL benches write: a model of 10 dense layers (kernel + bias), windows of
 * 8 minibatches (test/helpers/window-records.ts), without the special values, so every window has the same
 * number of points.
 */
import type { RunInfo, SinkRecord, WindowRecord } from '../src/protocol/records.js';
import { fakeRun, fakeWindows } from '../test/helpers/window-records.js';

export const LAYERS = 10;

export const benchRun = (id: string): RunInfo => fakeRun({ id, name: `bench ${id}`, group: 'bench', layers: LAYERS, started_at: Date.now() });
export const benchWindows = (run: RunInfo, count: number, seed: number): WindowRecord[] => fakeWindows(run, count, seed, false);
export const windowRecords = (ws: readonly WindowRecord[]): SinkRecord[] => ws.map((window) => ({ type: 'window', window }));
