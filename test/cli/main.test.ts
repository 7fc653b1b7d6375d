import { spawnSync } from 'node:child_process';
import { mkdtempSync, readFileSync, rmSync } from 'node:fs';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import { afterAll, beforeAll, describe, expect, it } from 'vitest';
import { monitor } from '../../src/index.js';
import { blobTensors, denseModel, tf, useCpu } from '../helpers/tf.js';

const dir = mkdtempSync(join(tmpdir(), 'tidemark-cli-'));
afterAll(() => rmSync(dir, { recursive: true, force: true }));
beforeAll(useCpu);

function cli(...args: string[]) {
  const r = spawnSync(process.execPath, ['--import', 'tsx', 'src/cli/main.ts', ...args], { encoding: 'utf8' });
  return { code: r.status, out: r.stdout, err: r.stderr };
}

describe('tidemark command', () => {
  it('summarises the runs of a JSON Lines store', async () => {
    const file = join(dir, 'runs.jsonl');
    const model = denseModel({ inputs: 4, hidden: [6], outputs: 2 });
    const { xs, ys } = blobTensors(64, 4, 2);
    const mon = await monitor(model, { store: file, run: 'cli "quoted" run', window: 4 });
    await model.fit(xs, ys, { epochs: 2, batchSize: 8, verbose: 0, callbacks: [mon.callback] });
    await mon.close();
    tf.dispose([xs, ys]);
    const r = cli('summary', file);
    expect(r.code).toBe(0);
    expect(r.out).toContain('cli "quoted" run');
    expect(r.out).toContain('finished, 4 windows');
    expect(r.out).toContain('step 16, epoch 1');
    // K = 4 of M = 8 minibatches per epoch: floor sqrt((1 − K/M)/K) = 0.354, −9.0 dB (methods.md §1.4).
    expect(r.out).toContain('SNR floor -9.0 dB');
    for (const layer of model.layers) expect(r.out).toContain(layer.name);
    expect(r.out).toContain('(network)');
  });

  it('prints its version', () => {
    const pkg = JSON.parse(readFileSync('package.json', 'utf8')) as { version: string };
    expect(cli('--version')).toMatchObject({ code: 0, out: `${pkg.version}\n` });
  });

  it('exits 2 on an unknown command and 1 on an unreadable file', () => {
    const bad = cli('frobnicate');
    expect(bad.code).toBe(2);
    expect(bad.err).toContain("Unknown command 'frobnicate'");
    const missing = cli('summary', join(dir, 'nope.jsonl'));
    expect(missing.code).toBe(1);
    expect(missing.err).toContain('cannot read');
  });
});
