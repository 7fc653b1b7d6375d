/**
 * examples/depth-sweep.ts: its core, runDepthSweep, on a tiny sweep (3 depths, 1 seed, 2 epochs) into a
 * temporary SQLite store; the hidden-layer option of the gearbox model it relies on; and the command line's
 * refusal of a bad argument. Two epochs are far too few for diffusion, so the sweep is checked for its
 * bookkeeping (every run either a point or left out), not for a fit.
 */
import { spawnSync } from 'node:child_process';
import { mkdtempSync, rmSync } from 'node:fs';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import { afterAll, beforeAll, describe, expect, it } from 'vitest';
import { hiddenWidths, runDepthSweep } from '../../examples/depth-sweep.js';
import { buildGearboxModel } from '../../examples/gearbox-data.js';
import { tf, useCpu } from '../helpers/tf.js';

beforeAll(useCpu);

describe('gearbox model hidden layers', () => {
  it('keeps 32-24-16-8-4 by default and builds the widths it is given', () => {
    const names = (m: tf.Sequential): string[] => m.layers.map((l) => l.name);
    const plain = buildGearboxModel(tf);
    const deep = buildGearboxModel(tf, { hidden: hiddenWidths(5) });
    try {
      expect(names(plain)).toEqual(['hidden1_24', 'hidden2_16', 'hidden3_8', 'output_4']);
      expect(names(deep)).toEqual(['hidden1_16', 'hidden2_16', 'hidden3_16', 'hidden4_16', 'hidden5_16', 'output_4']);
      expect(deep.countParams()).toBe(32 * 16 + 16 + 4 * (16 * 16 + 16) + 16 * 4 + 4);
    } finally {
      for (const m of [plain, deep]) {
        m.optimizer.dispose();
        m.dispose();
      }
    }
    expect(() => buildGearboxModel(tf, { hidden: [] })).toThrow(RangeError);
    expect(() => buildGearboxModel(tf, { hidden: [16, 0] })).toThrow(RangeError);
  });
});

describe('depth sweep example', () => {
  const dir = mkdtempSync(join(tmpdir(), 'tidemark-depth-sweep-'));
  afterAll(() => rmSync(dir, { recursive: true, force: true }));

  it('trains one run per depth into one group and reads back its sweep', async () => {
    const random = Math.random;
    const tensorsBefore = tf.memory().numTensors;
    const ends: number[] = [];
    const result = await runDepthSweep({
      depths: [1, 2, 3],
      seeds: [1],
      epochs: 2,
      store: join(dir, 'sweep.db'),
      group: 'depth-sweep-test',
      samples: 800,
      onRun: (e) => {
        if (e.kind === 'end') ends.push(e.depth);
      },
      onWarning: () => {},
    });
    expect(Math.random).toBe(random);
    expect(tf.memory().numTensors).toBe(tensorsBefore);
    expect(ends).toEqual([1, 2, 3]);
    expect(result.stopped).toBe(false);
    const report = result.report!;
    expect(report.runs.map((r) => r.id)).toEqual(result.runIds);
    expect(report.runs.map((r) => [r.tags.depth, r.tags.seed, r.status])).toEqual([
      ['1', '1', 'finished'],
      ['2', '1', 'finished'],
      ['3', '1', 'finished'],
    ]);
    const sweep = result.sweep!;
    expect(sweep.tag).toBe('depth');
    expect(sweep.points.length + sweep.left.length).toBe(3);
  });

  it('refuses a bad argument with its usage and exit code 2', () => {
    const r = spawnSync(process.execPath, ['--import', 'tsx', 'examples/depth-sweep.ts', '--epochs', '0'], { encoding: 'utf8', timeout: 60_000 });
    expect(r.status).toBe(2);
    expect(r.stderr).toContain('--epochs must be an integer');
    expect(r.stderr).toContain('usage: tsx examples/depth-sweep.ts');
  });
});
