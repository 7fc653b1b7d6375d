import { mkdtempSync, rmSync } from 'node:fs';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import { afterAll, beforeAll, describe, expect, it } from 'vitest';
import { EXIT, main } from '../../src/cli/main.js';
import { fmt } from '../../src/cli/format.js';
import type { ProbeLatest } from '../../src/cli/probe.js';
import { monitor } from '../../src/index.js';
import { openStore } from '../../src/storage/sqlite-store.js';
import { blobTensors, denseModel, tf, useCpu } from '../helpers/tf.js';
import { fakeRun, fakeWindows } from '../helpers/window-records.js';

const dir = mkdtempSync(join(tmpdir(), 'tidemark-show-probe-'));
afterAll(() => rmSync(dir, { recursive: true, force: true }));
const db = join(dir, 'runs.db');

async function run(...args: string[]) {
  let out = '';
  let err = '';
  const code = await main(args, { out: (s) => void (out += s), err: (s) => void (err += s) });
  return { code, out, err };
}

const LEGEND = '* every probe example in its own bin: this value says nothing about the layer';
const CAUTION_START = 'All are estimates that depend on their settings';

/** The whitespace-separated cells of the row of `layer` in the probe table (the line after the "probe" line). */
function probeRow(out: string, layer: string): string[] {
  const lines = out.split('\n');
  const start = lines.findIndex((l) => l.startsWith('  probe '));
  expect(start).toBeGreaterThan(0);
  const row = lines.slice(start + 1).find((l) => l.trim().split(/\s+/)[0] === layer);
  expect(row, `no probe row for ${layer}`).toBeDefined();
  return row!.trim().split(/\s+/);
}

function stored(file: string, runId: string, layer: string, step: number, metric: string): number | null {
  const store = openStore(file, { readonly: true });
  try {
    const pts = store.series(runId, metric, { layer, from: step, to: step });
    return pts.length > 0 ? pts[0]!.value : null;
  } finally {
    store.close();
  }
}

const ids: Record<'fine' | 'coarse' | 'plain', string> = { fine: '', coarse: '', plain: '' };
const layerNames: Record<string, string[]> = {};

beforeAll(async () => {
  await useCpu();
  const { xs, ys } = blobTensors(64, 4, 2);
  // 64 rows and 2 epochs of 8 minibatches: windows of 4 end at steps 4, 8, 12, 16.
  const runs = [
    // 30 bins per unit on 64 rows: six tanh units put nearly every row in its own cell.
    ['fine', { x: xs, y: ys, every: 2, bins: 30 }],
    // 2 bins per unit: at most 2^units cells, shared by many rows, so not every row has its own.
    ['coarse', { x: xs, y: ys, every: 1, bins: 2 }],
    ['plain', undefined],
  ] as const;
  for (const [name, probe] of runs) {
    const model = denseModel({ inputs: 4, hidden: [6], outputs: 2 });
    const mon = await monitor(model, { store: db, run: name, window: 4, ...(probe !== undefined && { probe }) });
    await model.fit(xs, ys, { epochs: 2, batchSize: 8, shuffle: false, verbose: 0, callbacks: [mon.callback] });
    await mon.close();
    ids[name] = mon.runId;
    layerNames[name] = model.layers.map((l) => l.name);
  }
  tf.dispose([xs, ys]);
});

describe('tidemark show with probe values', () => {
  it('lists each layer at its latest probe step, with stored values and saturated ones marked', async () => {
    const r = await run('show', 'fine', '--db', db);
    expect(r.code).toBe(EXIT.ok);
    expect(r.out).toContain("  probe    binned-plugin, 30 bins per unit, 64 rows; bounds pairwise-kolchinsky-tracey, σ² 0.2 × each layer's spread, 64 rows; I(T;Y) ≥ linear-probe-barber-agakov, 64 rows in 2 folds; every 2 windows");
    expect(r.out).toContain(CAUTION_START);
    const flags: number[] = [];
    for (const layer of layerNames.fine!) {
      const cells = probeRow(r.out, layer);
      // every: 2 probes windows 0 and 2 (steps 4 and 12); the last window (step 16) has none.
      expect(cells[1]).toBe('12');
      const v = (m: string) => stored(db, ids.fine, layer, 12, m);
      const sat = v('mi_saturated');
      expect(sat === 0 || sat === 1).toBe(true);
      flags.push(sat!);
      const mark = sat === 1 ? '*' : '';
      // The noise-regularised values first, then the binned ones.
      const boundsMark = v('mi_bounds_saturated') === 1 ? '†' : '';
      expect(cells[2]).toBe(`${fmt(v('mi_input_lower'))}–${fmt(v('mi_input_upper'))}${boundsMark}`);
      expect(cells[3]).toBe(fmt(v('mi_label_pairwise')) + boundsMark);
      expect(cells[4]).toBe(v('mi_noise_variance')!.toPrecision(3));
      // The linear read-out's lower bound, with its held-out accuracy.
      expect(cells[5]).toBe(fmt(v('mi_label_linear')));
      expect(cells[6]).toBe(`${(100 * v('linear_accuracy')!).toFixed(1)}%`);
      expect(cells[7]).toBe(fmt(v('mi_input')) + mark);
      expect(cells[8]).toBe(fmt(v('mi_label')) + mark);
      // The share of activations at their limit, in per cent as the demo prints it.
      expect(cells[9]).toBe(`${(100 * v('act_saturation')!).toFixed(1)}%`);
      expect(cells[10]).toBe('64');
    }
    // The first (6-unit tanh) layer is saturated at 30 bins here; the mark and its legend must show.
    expect(flags[0]).toBe(1);
    expect(r.out).toContain(LEGEND);
  });

  it('shows no mark and no legend when no value is saturated', async () => {
    const r = await run('show', 'coarse', '--db', db);
    expect(r.code).toBe(EXIT.ok);
    expect(r.out).toContain('2 bins per unit');
    for (const layer of layerNames.coarse!) {
      const cells = probeRow(r.out, layer);
      expect(cells[1]).toBe('16');
      expect(stored(db, ids.coarse, layer, 16, 'mi_saturated')).toBe(0);
      expect(cells[7]).toBe(fmt(stored(db, ids.coarse, layer, 16, 'mi_input')));
      expect(cells[8]).toBe(fmt(stored(db, ids.coarse, layer, 16, 'mi_label')));
    }
    expect(r.out).not.toContain('*');
    expect(r.out).not.toContain(LEGEND);
    expect(r.out).toContain(CAUTION_START);
  });

  it('puts the same values, settings and notes into --json', async () => {
    const r = await run('show', 'fine', '--db', db, '--json');
    expect(r.code).toBe(EXIT.ok);
    const probe = (JSON.parse(r.out) as { probe: ProbeLatest }).probe;
    expect(probe.settings).toEqual({
      estimator: 'binned-plugin',
      bins: 30,
      rows: 64,
      every: 2,
      budget: null,
      bounds: { estimator: 'pairwise-kolchinsky-tracey', noise_ratio: 0.2, noise_variance: null, rows: 64 },
      linear: { estimator: 'linear-probe-barber-agakov', rows: 64, folds: 2 },
    });
    expect(probe.layers.map((l) => l.layer)).toEqual(layerNames.fine);
    for (const l of probe.layers) {
      expect(l.step).toBe(12);
      for (const [metric, value] of Object.entries(l.values)) expect(value, metric).toBe(stored(db, ids.fine, l.layer, 12, metric));
    }
    expect(probe.layers[0]!.values.mi_saturated).toBe(1);
    expect(probe.saturated_note).toBe(LEGEND.slice(2));
    expect(probe.caution).toContain(CAUTION_START);
  });

  it('leaves the output of a run without probe as it was', async () => {
    const plain = await run('show', 'plain', '--db', db);
    expect(plain.code).toBe(EXIT.ok);
    expect(plain.out).not.toContain('probe');
    expect(plain.out).not.toContain('I(X;T)');
    expect(plain.out).not.toContain(CAUTION_START);
    // Blocks: the header, the gradient table, the markers, the caution; a probe run has its block before the markers.
    const blocks = (s: string) => s.trimEnd().split('\n\n');
    expect(blocks(plain.out)).toHaveLength(4);
    const fine = blocks((await run('show', 'fine', '--db', db)).out);
    expect(fine).toHaveLength(5);
    expect(fine[2]).toMatch(/^ {2}probe {4}/);
    expect(fine[3]).toMatch(/^ {2}(no markers|marker )/);
    const json = JSON.parse((await run('show', 'plain', '--db', db, '--json')).out) as { probe: unknown };
    expect(json.probe).toBeNull();
  });
});

describe('tidemark show with partial probe values', () => {
  it("takes each layer's own latest probe step and marks saturated bounds", async () => {
    const file = join(dir, 'fake.db');
    const info = fakeRun({ id: 'f0000000-0000-4000-8000-000000000001', name: 'fake-probe', layers: 3 });
    info.config = {
      ...info.config,
      probe: {
        rows: 256,
        every: 'auto',
        budget: 0.03,
        labels: { kind: 'onehot', classes: 3 },
        binned: { estimator: 'binned-plugin', bins: 12, saturation_margin_bits: 0.1 },
        bounds: { estimator: 'pairwise-kolchinsky-tracey', noise_variance: 0.25, rows: 128 },
        layers: {},
      },
    };
    const ws = fakeWindows(info, 5, 3, false);
    // Layer 1 probed in windows 0 and 2 (steps 8, 24), its bounds saturated at 24 and no act_saturation
    // (an unbounded activation); layer 2 only in window 0; layer 3 never.
    Object.assign(ws[0]!.layers.dense_Dense1!, { mi_input: 4.5, mi_label: 0.9, mi_saturated: 0, mi_input_lower: 3.2, mi_input_upper: 4.4, mi_bounds_saturated: 0, probe_rows: 256 });
    Object.assign(ws[2]!.layers.dense_Dense1!, { mi_input: 3.25, mi_label: 0.75, mi_saturated: 0, mi_input_lower: 6.99, mi_input_upper: 7.0, mi_bounds_saturated: 1, probe_rows: 250 });
    Object.assign(ws[0]!.layers.dense_Dense2!, { mi_input: 8, mi_label: 1.5, mi_saturated: 1, act_saturation: 0.125, probe_rows: 256 });
    const store = openStore(file);
    store.beginRun(info);
    store.append(ws.map((window) => ({ type: 'window' as const, window })));
    store.close();

    const r = await run('show', 'fake-probe', '--db', file);
    expect(r.code).toBe(EXIT.ok);
    expect(r.out).toContain(
      '  probe    binned-plugin, 12 bins per unit, 256 rows; bounds pairwise-kolchinsky-tracey, σ² 0.25, 128 rows; every: auto (at most 3.0% of training time)',
    );
    // A run stored before the noise ratio: no pairwise I(T;Y) or σ² per layer, an absolute σ² in its config.
    expect(probeRow(r.out, 'dense_Dense1')).toEqual(['dense_Dense1', '24', '6.990–7.000†', '—', '—', '—', '—', '3.250', '0.750', '—', '250']);
    expect(probeRow(r.out, 'dense_Dense2')).toEqual(['dense_Dense2', '8', '—', '—', '—', '—', '—', '8.000*', '1.500*', '12.5%', '256']);
    // dense_Dense3 appears in the gradient table only.
    expect(r.out.split('\n').filter((l) => l.trim().startsWith('dense_Dense3'))).toHaveLength(1);
    expect(r.out).toContain(LEGEND);
    expect(r.out).toContain('† every probe example told apart through the added noise: these bounds say nothing about the layer');

    const json = JSON.parse((await run('show', 'fake-probe', '--db', file, '--json')).out) as { probe: ProbeLatest };
    expect(json.probe.layers.map((l) => [l.layer, l.step, l.values.mi_input, l.values.act_saturation])).toEqual([
      ['dense_Dense1', 24, 3.25, null],
      ['dense_Dense2', 8, 8, 0.125],
    ]);
  });
});
