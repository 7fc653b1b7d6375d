/**
 * `tidemark group`: five runs of one group with known transition steps (written here), read back together.
 * The median and the quartile bands are checked against simple-statistics on the same numbers.
 */
import { linearRegression, median as ssMedian } from 'simple-statistics';
import { describe, expect, it } from 'vitest';
import { valuesOnLogSteps } from '../../src/analysis/group-bands.js';
import { renderGroup, renderSweep } from '../../src/cli/group.js';
import { groupReport, sweepOf } from '../../src/storage/group-report.js';
import { main, EXIT } from '../../src/cli/main.js';
import type { Marker, RunInfo, SinkRecord } from '../../src/protocol/records.js';
import { asAsyncStore } from '../../src/storage/async-store.js';
import { openStore } from '../../src/storage/sqlite-store.js';
import { mkdtempSync, rmSync } from 'node:fs';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import { fakeRun, fakeWindows } from '../helpers/window-records.js';

const NETWORK_STEPS = [96, 120, 80, 144, 104];
const DENSE1_STEPS = [40, 64, 48, null, 56];

function seedGroup(path: string, group: string, renameLayers = false): RunInfo[] {
  const store = openStore(path);
  const runs: RunInfo[] = [];
  try {
    for (let k = 0; k < 5; k++) {
      let run = fakeRun({ id: `${group}-run-${k}`, name: `${group} seed ${k}`, group, started_at: 1_700_000_000_000 + k * 1000 });
      if (renameLayers && k === 4) run = { ...run, layers: run.layers.map((l, i) => ({ ...l, name: `other_${i}` })) };
      runs.push(run);
      store.beginRun(run);
      const ws = fakeWindows(run, 20, 10 + k);
      const markers: Marker[] = [{ run: run.id, layer: null, kind: 'diffusion-start', step: NETWORK_STEPS[k]!, detected_step: NETWORK_STEPS[k]! + 16, confidence: 0.8, details: {} }];
      const first = run.layers[0]!.name;
      if (DENSE1_STEPS[k] !== null) markers.push({ run: run.id, layer: first, kind: 'diffusion-start', step: DENSE1_STEPS[k]!, detected_step: DENSE1_STEPS[k]! + 8, confidence: 0.7, details: {} });
      // An offline re-analysis's marker is another question: it must not count.
      markers.push({ run: run.id, layer: null, kind: 'diffusion-start', step: 8, detected_step: 8, confidence: 0.5, details: { source: 'offline' } });
      if (k === 2) markers.push({ run: run.id, layer: null, kind: 'advice', step: 152, detected_step: 152, confidence: 0.6, details: { verdict: 'stop' } });
      store.append([...ws.map((window): SinkRecord => ({ type: 'window', window })), ...markers.map((marker): SinkRecord => ({ type: 'marker', marker }))]);
    }
  } finally {
    store.close();
  }
  return runs;
}

describe('tidemark group', () => {
  const dir = mkdtempSync(join(tmpdir(), 'tidemark-group-'));
  const db = join(dir, 'group.db');
  seedGroup(db, 'depth3');
  seedGroup(db, 'mixed', true);

  it("gives each layer's transition per run, the median (as simple-statistics) and a bootstrap interval", async () => {
    const store = asAsyncStore(openStore(db, { readonly: true }));
    try {
      const r = (await groupReport(store, 'depth3'))!;
      expect(r.runs.map((x) => x.id)).toEqual([0, 1, 2, 3, 4].map((k) => `depth3-run-${k}`));
      expect(r.byPosition).toBe(false);
      const network = r.layers.find((l) => l.position === null)!;
      expect(network.transitions).toEqual(NETWORK_STEPS);
      expect(network.transition!.median).toBe(ssMedian(NETWORK_STEPS));
      expect(network.transition!.low).toBeGreaterThanOrEqual(80);
      expect(network.transition!.high).toBeLessThanOrEqual(144);
      const dense1 = r.layers.find((l) => l.position === 0)!;
      expect(dense1.transitions).toEqual(DENSE1_STEPS);
      expect(dense1.transition).toMatchObject({ median: ssMedian([40, 64, 48, 56]), n: 4 });
      expect(r.stops).toEqual([null, null, 152, null, null]);
      // Bands: at every grid step inside all five runs, the median of the five runs' values there (each read
      // back and interpolated on log step) as simple-statistics computes it.
      const onGrid = await Promise.all(r.runs.map(async (run) => valuesOnLogSteps(await store.series(run.id, 'grad_snr_db'), r.grid)));
      const full = r.grid.map((_, g) => g).filter((g) => onGrid.every((v) => Number.isFinite(v[g])));
      expect(full.length).toBeGreaterThan(2);
      for (const g of full) {
        expect(network.snrDb[g]!.n).toBe(5);
        expect(network.snrDb[g]!.median).toBeCloseTo(ssMedian(onGrid.map((v) => v[g]!)), 10);
      }
      expect(renderGroup(r)).toContain('median 104 [');
    } finally {
      await store.close();
    }
  });

  it('compares layers by position, and says so, when runs name them differently', async () => {
    const store = asAsyncStore(openStore(db, { readonly: true }));
    try {
      const r = (await groupReport(store, 'mixed'))!;
      expect(r.byPosition).toBe(true);
      expect(r.layers.find((l) => l.position === 0)!.transitions).toEqual(DENSE1_STEPS);
      expect(renderGroup(r)).toContain('compared by position');
      expect(await groupReport(store, 'no-such-group')).toBeNull();
    } finally {
      await store.close();
    }
  });

  it('fits a sweep over a numeric tag as a power law: the slope of simple-statistics on the logs, two intervals, residuals', async () => {
    const path = join(dir, 'sweep.db');
    const store = openStore(path);
    // Depth 1–6; the network's diffusion began at 100·depth^0.5, times a fixed wobble (so residuals are not 0).
    const wobble = [1.04, 0.97, 1.02, 0.95, 1.05, 0.99];
    const ys = wobble.map((w, i) => Math.round(100 * Math.sqrt(i + 1) * w));
    for (let d = 1; d <= 7; d++) {
      const run = fakeRun({ id: `sweep-run-${d}`, name: `depth ${d}`, group: 'depth-sweep', tags: d === 7 ? {} : { depth: String(d) }, started_at: 1_700_000_000_000 + d });
      store.beginRun(run);
      const step = d === 7 ? 300 : ys[d - 1]!;
      store.append([
        ...fakeWindows(run, 4).map((window): SinkRecord => ({ type: 'window', window })),
        { type: 'marker', marker: { run: run.id, layer: null, kind: 'diffusion-start', step, detected_step: step + 8, confidence: 0.8, details: {} } },
      ]);
    }
    store.close();
    const s = asAsyncStore(openStore(path, { readonly: true }));
    try {
      const w = sweepOf((await groupReport(s, 'depth-sweep'))!, 'depth', 'diffusion-start');
      expect(w.points.map((p) => [p.x, p.y])).toEqual(ys.map((y, i) => [i + 1, y]));
      expect(w.left).toEqual([{ run: 'sweep-run-7', why: 'no tag depth' }]);
      const ref = linearRegression(w.points.map((p) => [Math.log(p.x), Math.log(p.y)]));
      expect(w.fit!.slope).toBeCloseTo(ref.m, 12);
      expect(w.fit!.intercept).toBeCloseTo(ref.b, 12);
      expect(w.fit!.slope).toBeGreaterThan(0.4);
      expect(w.fit!.slope).toBeLessThan(0.6);
      expect(w.fit!.ci95[0]).toBeLessThan(w.fit!.slope);
      expect(w.bootstrap!.low).toBeLessThanOrEqual(w.fit!.slope);
      expect(w.bootstrap!.high).toBeGreaterThanOrEqual(w.fit!.slope);
      w.residuals.forEach((r, i) => expect(r).toBeCloseTo(Math.log(ys[i]!) - (ref.b + ref.m * Math.log(i + 1)), 12));
      expect(renderSweep(w)).toContain('exponent 95 % interval');
      expect(sweepOf((await groupReport(s, 'depth-sweep'))!, 'depth', 'stop').fit).toBeNull();
    } finally {
      await s.close();
    }
  });

  it('prints the report from the command line, and exits 3 for an empty group', async () => {
    let out = '';
    let err = '';
    const io = { out: (s: string) => void (out += s), err: (s: string) => void (err += s) };
    expect(await main(['group', 'depth3', '--db', db], io)).toBe(EXIT.ok);
    expect(out).toContain('group depth3: 5 runs');
    expect(out).toContain('held-out data');
    expect(await main(['group', 'nothing', '--db', db], io)).toBe(EXIT.notFound);
    expect(err).toContain('No run is in group "nothing"');
    out = '';
    expect(await main(['group', 'depth-sweep', '--sweep', 'depth', '--db', join(dir, 'sweep.db')], io)).toBe(EXIT.ok);
    expect(out).toMatch(/depth\^0\.\d{3}/);
    rmSync(dir, { recursive: true, force: true });
  });
});
