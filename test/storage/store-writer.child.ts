/**
 * A training process stand-in for the concurrency test: writes one run's windows into a shared
 * store in small batches, as the store sink does, with a heartbeat between batches.
 * Usage: node --import tsx store-writer.child.ts DB RUN_ID SEED WINDOWS
 */
import { openStore } from '../../src/storage/sqlite-store.js';
import { fakeRun, fakeWindows } from '../helpers/window-records.js';

const [path, id, seed, count] = process.argv.slice(2) as [string, string, string, string];
const store = openStore(path);
const run = fakeRun({ id });
store.beginRun(run);
const windows = fakeWindows(run, Number(count), Number(seed));
for (let i = 0; i < windows.length; i += 3) {
  store.append(windows.slice(i, i + 3).map((window) => ({ type: 'window' as const, window })));
  store.heartbeat(id);
}
store.append([{ type: 'end', run: id, status: 'finished', step: windows.at(-1)!.step, time: Date.now() }]);
store.close();
process.stdout.write(`ok ${windows.length}\n`);
