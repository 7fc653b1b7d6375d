/**
 * monitor()'s options: every numeric setting is range-checked before training, a watched quantity that
 * fit never logs is said at once, and a URL never becomes a folder.
 */
import { existsSync, mkdtempSync, readdirSync, rmSync } from 'node:fs';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import { afterAll, beforeAll, describe, expect, it } from 'vitest';
import { resolveOptions } from '../../src/callback/options.js';
import { monitor, type MonitorWarning } from '../../src/index.js';
import { blobTensors, denseModel, tf, useCpu } from '../helpers/tf.js';

beforeAll(async () => {
  await useCpu();
});

function thrown(f: () => unknown): { code?: string; message: string } {
  try {
    f();
  } catch (e) {
    return e as { code?: string; message: string };
  }
  throw new Error('expected a throw');
}

describe('numeric options are range-checked with the option named', () => {
  it.each([
    [{ phases: { networkShare: 2 } }, "Option 'phases.networkShare' must be a number from 0 to 1; received 2."],
    [{ phases: { networkShare: -1 } }, "Option 'phases.networkShare' must be a number from 0 to 1; received -1."],
    [{ phases: { h: -1 } }, "Option 'phases.h' must be a number > 0; received -1."],
    [{ phases: { noiseWindows: 1.5 } }, "Option 'phases.noiseWindows' must be an integer from 2 to 10000; received 1.5."],
    [{ advice: { patience: 0 } }, "Option 'advice.patience' must be an integer from 5 to 100000; received 0."],
    [{ advice: { minGain: -5 } }, "Option 'advice.minGain' must be a number > 0 and < 1; received -5."],
    [{ advice: { diffusionRatio: -1 } }, "Option 'advice.diffusionRatio' must be a number from 0 to 1000; received -1."],
    [{ advice: { watch: '' } }, "Option 'advice.watch' must be a non-empty string; received ''."],
  ])('refuses %j', (options, message) => {
    const e = thrown(() => resolveOptions({ store: 'memory', ...options }));
    expect(e.code).toBe('TIDEMARK_ERR_OPTION_INVALID');
    expect(e.message).toBe(message);
  });

  it('suggests the option meant', () => {
    const e = thrown(() => resolveOptions({ store: 'memory', phases: { netwrkShare: 0.5 } }));
    expect(e.code).toBe('TIDEMARK_ERR_OPTION_UNKNOWN');
    expect(e.message).toBe("Unknown option 'phases.netwrkShare'. Did you mean 'phases.networkShare'?");
  });

  it('throws from monitor() before training, not a warning during it', async () => {
    const model = denseModel({ inputs: 4, hidden: [5], outputs: 2 });
    await expect(monitor(model, { store: 'memory', phases: { networkShare: 2 } })).rejects.toMatchObject({
      code: 'TIDEMARK_ERR_OPTION_INVALID',
    });
    model.dispose();
  });
});

describe('advice.watch naming a quantity fit does not log', () => {
  it('warns once at the first epoch end with the names that exist, and the advice never reports its trend', async () => {
    const warnings: MonitorWarning[] = [];
    const { xs, ys } = blobTensors(256, 4, 2);
    const model = denseModel({ inputs: 4, hidden: [6], outputs: 2, lr: 0.2 });
    const mon = await monitor(model, {
      store: 'memory',
      window: 4,
      noise: false,
      advice: { watch: 'val_los' },
      onWarning: (w) => void warnings.push(w),
    });
    const advice: (ReturnType<typeof mon.advice>)[] = [];
    mon.onWindow(() => advice.push(mon.advice()));
    await model.fit(xs, ys, { epochs: 4, batchSize: 16, validationSplit: 0.25, verbose: 0, callbacks: [mon.callback] });
    await mon.close();
    tf.dispose([xs, ys]);
    const watchWarnings = warnings.filter((w) => w.code === 'TIDEMARK_ERR_ADVICE_WATCH');
    expect(watchWarnings).toHaveLength(1);
    expect(watchWarnings[0]!.message).toContain("advice.watch is 'val_los', but the first epoch logged loss, val_loss");
    expect(watchWarnings[0]!.message).toContain("did you mean 'val_loss'?");
    expect(advice.length).toBeGreaterThan(3);
    expect(advice.every((a) => a === null || a.verdict === 'continue')).toBe(true);
    for (const a of advice) {
      if (a === null) continue;
      expect(a.reason).not.toMatch(/val_los (changed|has \d+ value)/);
      expect(a.best).toBeNull();
    }
  });
});

describe("store given as a URL", () => {
  const dir = mkdtempSync(join(tmpdir(), 'tidemark-url-'));
  const cwd = process.cwd();
  beforeAll(() => process.chdir(dir));
  afterAll(() => {
    process.chdir(cwd);
    rmSync(dir, { recursive: true, force: true });
  });

  it("takes the server's http:// address and creates no file or folder", async () => {
    const model = denseModel({ inputs: 4, hidden: [5], outputs: 2 });
    const mon = await monitor(model, { store: 'http://127.0.0.1:1', run: 'url', noise: false, onWarning: () => {} });
    await mon.close();
    model.dispose();
    expect(existsSync(join(dir, 'http:'))).toBe(false);
    expect(readdirSync(dir)).toEqual([]);
  });

  it('refuses any other scheme with what to use instead', () => {
    const e = thrown(() => resolveOptions({ store: 'mysql://db/runs' }));
    expect(e.code).toBe('TIDEMARK_ERR_OPTION_INVALID');
    expect(e.message).toContain("Option 'store' is a mysql:// URL");
    expect(e.message).toContain('http://');
    expect(e.message).toContain('postgres://');
  });

  it('takes a postgres:// URL as a database store (issue 14)', () => {
    expect(resolveOptions({ store: 'postgres://db/runs' }).store).toBe('postgres://db/runs');
    expect(resolveOptions({ store: 'postgresql://u@db:5433/runs?schema=team' }).store).toBe('postgresql://u@db:5433/runs?schema=team');
  });
});
