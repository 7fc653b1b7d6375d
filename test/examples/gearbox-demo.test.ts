/**
 * The demo at its default settings (examples/gearbox-demo.ts, all 120 epochs: fewer leave the probe's time budget one window), run as a user
 * runs it: every hidden layer's noise-regularised information estimate is unsaturated in every probe
 * window, and the page's plane model draws one path per layer from it (the drawing itself is checked in
 * chromium by test/web/page.e2e.test.ts). The demo's data is invented; this checks the demo, not a value.
 */
import { spawnSync } from 'node:child_process';
import { mkdtempSync, rmSync } from 'node:fs';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import { afterAll, describe, expect, it } from 'vitest';
import { openStore } from '../../src/index.js';
import { infoPlane, planeSettings } from '../../src/web/model.js';

const dir = mkdtempSync(join(tmpdir(), 'tidemark-demo-'));
afterAll(() => rmSync(dir, { recursive: true, force: true }));

describe('gearbox demo at default settings', () => {
  it('gives every hidden layer an unsaturated information estimate in every probe window, and a path per layer', { timeout: 180_000 }, () => {
    const db = join(dir, 'demo.db');
    const r = spawnSync(process.execPath, ['--import', 'tsx', 'examples/gearbox-demo.ts', '--exit', '--out', db, '--port', '0'], {
      encoding: 'utf8',
      timeout: 170_000,
    });
    expect(r.status, r.stderr.slice(-2000)).toBe(0);
    const store = openStore(db, { readonly: true });
    try {
      const run = store.resolveRun('gearbox-demo');
      const layers = run.layers.map((l) => l.name);
      const windows = store.windows(run.id);
      const probed = windows.filter((w) => layers.some((n) => w.layers[n]?.mi_input_upper !== undefined));
      expect(probed.length).toBeGreaterThanOrEqual(2);
      for (const w of probed) {
        for (const name of layers.slice(0, -1)) {
          expect(w.layers[name]!.mi_bounds_saturated, `${name} at step ${w.step}`).toBe(0);
          expect(w.layers[name]!.mi_noise_variance, `${name} at step ${w.step}`).toBeGreaterThan(0);
        }
      }
      const plane = infoPlane(layers, windows, 'pairwise', planeSettings(run.config));
      expect(plane.estimator).toBe('pairwise');
      expect(plane.trajectories.map((t) => t.label)).toEqual(layers);
      for (const t of plane.trajectories) expect(t.points.length).toBe(probed.length);
    } finally {
      store.close();
    }
  });
});
