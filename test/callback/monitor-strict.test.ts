/**
 * A statistic that throws during training: absorbed and reported by default, thrown into fit in
 * strict mode. The failure is injected by replacing the analysis function for this file only.
 */
import { beforeAll, describe, expect, it, vi } from 'vitest';
import { monitor, type MonitorWarning } from '../../src/index.js';
import { blobTensors, denseModel, tf, useCpu } from '../helpers/tf.js';

vi.mock('../../src/analysis/gradient-stats.js', async (importOriginal) => {
  const real = await importOriginal<typeof import('../../src/analysis/gradient-stats.js')>();
  return {
    ...real,
    gradientStats: () => {
      throw new Error('statistic exploded');
    },
  };
});

beforeAll(useCpu);

describe('monitor with a throwing statistic', () => {
  it('lets fit finish and reports the problem once', async () => {
    const model = denseModel({ inputs: 4, hidden: [6], outputs: 2 });
    const { xs, ys } = blobTensors(128, 4, 2);
    const warnings: MonitorWarning[] = [];
    const mon = await monitor(model, { window: 4, onWarning: (w) => void warnings.push(w) });
    const h = await model.fit(xs, ys, { epochs: 2, batchSize: 8, verbose: 0, callbacks: [mon.callback] });
    await mon.close();
    expect(h.history.loss!.length).toBe(2);
    expect(warnings).toMatchObject([{ code: 'TIDEMARK_ERR_STATISTIC', message: 'statistic exploded' }]);
    expect(mon.windows().length).toBe(0);
    tf.dispose([xs, ys]);
  });

  it('throws into fit in strict mode, with the code', async () => {
    const model = denseModel({ inputs: 4, hidden: [6], outputs: 2 });
    const { xs, ys } = blobTensors(64, 4, 2);
    const mon = await monitor(model, { window: 4, strict: true });
    await expect(model.fit(xs, ys, { epochs: 1, batchSize: 8, verbose: 0, callbacks: [mon.callback] })).rejects.toMatchObject({
      name: 'TidemarkError',
      code: 'TIDEMARK_ERR_STATISTIC',
      message: 'statistic exploded',
    });
    await mon.close();
    tf.dispose([xs, ys]);
  });
});
