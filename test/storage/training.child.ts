/**
 * A real training process for the crash test: trains a small model with the monitor writing to the
 * SQLite store given on the command line, and says "window" on stdout each time one is stored.
 * Usage: node --import tsx training.child.ts DB SEED
 */
import * as tf from '@tensorflow/tfjs';
import { monitor } from '../../src/index.js';
import { blobTensors, denseModel } from '../helpers/tf.js';

const [db, seed] = process.argv.slice(2) as [string, string];
await tf.setBackend('cpu');
const model = denseModel({ inputs: 6, hidden: [16, 8], outputs: 3, seed: Number(seed) });
const { xs, ys } = blobTensors(512, 6, 3, Number(seed));
const mon = await monitor(model, {
  store: db,
  window: 4,
  run: `crash-${seed}`,
  // A store that cannot be opened would leave this run out of it: say why and end, so the test shows it.
  onWarning: (w) => {
    if (w.code !== 'TIDEMARK_ERR_SINK_OPEN') return;
    process.stderr.write(`${w.code}: ${w.message}\n`);
    process.exit(3);
  },
});
mon.onWindow(() => {
  // The sink stores on its own schedule; flush so the parent may kill us right after a write too.
  void mon.flush().then(() => process.stdout.write('window\n'));
});
await model.fit(xs, ys, { epochs: 1000, batchSize: 8, verbose: 0, callbacks: [mon.callback] });
await mon.close();
