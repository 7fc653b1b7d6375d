import { describe, expect, it } from 'vitest';
import type { Marker } from '../../src/protocol/records.js';
import {
  CAUTION,
  adviceSentence,
  floorEnd,
  formatNumber,
  stripTicks,
  compareHash,
  compareLabels,
  currentPhase,
  mergeWindows,
  overlayColumns,
  windowBudget,
  windowsIn,
  withRange,
  decodeJson,
  infoPlane,
  infoTrajectories,
  latestAdvice,
  planeOf,
  planeSentence,
  planeSettings,
  settingText,
  tint,
  withPlane,
  lossColumns,
  mergeRuns,
  noiseColumns,
  noiseSentence,
  parseRoute,
  phaseRows,
  runHash,
  runMatches,
  snrColumns,
  levelColumns,
  tokenFrom,
  travelColumns,
} from '../../src/web/model.js';
import { layerStyle, OKABE_ITO } from '../../src/web/palette.js';
import { fakeRun, fakeWindows } from '../helpers/window-records.js';

const summary = (id: string, over: Partial<Parameters<typeof runMatches>[0]> = {}) => ({
  id,
  name: `run ${id}`,
  group: null,
  tags: {},
  status: 'running' as const,
  created_at: 1,
  ended_at: null,
  last_step: null,
  windows: 0,
  ...over,
});

describe('page model', () => {
  it('filters runs by every word against name, group and tags', () => {
    const r = summary('a1', { name: 'gearbox', group: 'sweep-3', tags: { lr: '0.05', opt: 'adam' } });
    expect(runMatches(r, '')).toBe(true);
    expect(runMatches(r, 'GEAR')).toBe(true);
    expect(runMatches(r, 'sweep-3 lr=0.05')).toBe(true);
    expect(runMatches(r, 'adam')).toBe(true);
    expect(runMatches(r, 'lr=0.1')).toBe(false);
    expect(runMatches(r, 'gearbox sgd')).toBe(false);
  });

  it('merges live rows into the list by id, newest first', () => {
    const list = mergeRuns([], [summary('a', { created_at: 1 }), summary('b', { created_at: 2 })]);
    expect(list.map((r) => r.id)).toEqual(['b', 'a']);
    const next = mergeRuns(list, [summary('a', { created_at: 1, status: 'finished', last_step: 40 }), summary('c', { created_at: 3 })]);
    expect(next.map((r) => r.id)).toEqual(['c', 'b', 'a']);
    expect(next.find((r) => r.id === 'a')?.status).toBe('finished');
  });

  it('reads the route and the token from the URL', () => {
    expect(parseRoute('')).toEqual({ view: 'runs' });
    expect(parseRoute('#/')).toEqual({ view: 'runs' });
    expect(parseRoute(runHash('run/x y'))).toEqual({ view: 'run', id: 'run/x y', range: null });
    expect(parseRoute('#/run/abc?token=secret-123')).toEqual({ view: 'run', id: 'abc', range: null });
    expect(parseRoute('#/run/%E0%A4%A')).toEqual({ view: 'run', id: '%E0%A4%A', range: null });
    // Compare: ids escaped, so a comma inside one is not a separator; repeats dropped.
    expect(compareHash(['a,1', 'b'])).toBe('#/compare/a%2C1,b');
    expect(parseRoute(compareHash(['a,1', 'b']))).toEqual({ view: 'compare', ids: ['a,1', 'b'], range: null });
    expect(parseRoute('#/compare/x,,y,x?token=t-12345678')).toEqual({ view: 'compare', ids: ['x', 'y'], range: null });
    // The zoomed step range rides in the fragment's query, beside a token, and only a sensible one is read.
    expect(parseRoute('#/run/abc?steps=800-1600&token=t-12345678')).toEqual({ view: 'run', id: 'abc', range: { min: 800, max: 1600 } });
    expect(parseRoute('#/run/abc?steps=1600-800')).toEqual({ view: 'run', id: 'abc', range: null });
    expect(parseRoute('#/run/abc?steps=0-10')).toEqual({ view: 'run', id: 'abc', range: null });
    expect(withRange('#/compare/a,b?token=t-12345678', { min: 800.4, max: 1599.6 })).toBe('#/compare/a,b?token=t-12345678&steps=800-1600');
    expect(withRange('#/run/abc?steps=800-1600&token=t-12345678', null)).toBe('#/run/abc?token=t-12345678');
    expect(withRange('#/run/abc', null)).toBe('#/run/abc');
    expect(tokenFrom('?token=t1', '')).toBe('t1');
    expect(tokenFrom('', '#/run/a?token=t2')).toBe('t2');
    expect(tokenFrom('', '#token=t3')).toBe('t3');
    expect(tokenFrom('', '#/run/a')).toBeNull();
  });

  it('decodes the protocol non-finite strings', () => {
    expect(decodeJson('{"a":"NaN","b":"-Infinity","c":"x"}')).toEqual({ a: Number.NaN, b: -Infinity, c: 'x' });
  });

  it('turns windows into sorted chart columns with gaps for non-finite values', () => {
    const run = fakeRun({ id: 'r' });
    const ws = fakeWindows(run, 6);
    const cols = snrColumns(
      run.layers.map((l) => l.name),
      [ws[3]!, ws[0]!, ...ws, ws[5]!],
    );
    expect(cols.steps).toEqual([8, 16, 24, 32, 40, 48]);
    expect(cols.labels).toEqual(['dense_Dense1', 'dense_Dense2', 'dense_Dense3', '(network)']);
    expect(cols.series).toHaveLength(4);
    // fakeWindows puts -Infinity dB in window 4.
    expect(cols.series[0]![4]).toBeNull();
    expect(cols.series[0]![1]).toBeCloseTo(ws[1]!.layers.dense_Dense1!.grad_snr_db, 12);
    expect(cols.series[3]![1]).toBeCloseTo(ws[1]!.network.grad_snr_db, 12);
    expect(cols.floor[0]).toBeCloseTo(20 * Math.log10(1 / Math.sqrt(8)), 12);
  });

  it('finds where the noise floor ends (windows of a whole epoch have none), to say why on the page', () => {
    expect(floorEnd([8, 16, 24, 32], [-5, -6, null, null])).toBe(16);
    expect(floorEnd([8, 16], [-5, -6])).toBeNull();
    expect(floorEnd([8, 16], [null, null])).toBeNull();
    expect(floorEnd([], [])).toBeNull();
  });

  it('labels the phase strip\'s log step axis at 1, 2, 5 × 10^k inside the range, never closer than 48 px', () => {
    expect(stripTicks(1, 6000, 800)).toEqual([1, 2, 5, 10, 20, 50, 100, 200, 500, 1000, 2000, 5000]);
    expect(stripTicks(800, 1600, 800)).toEqual([1000]);
    // Narrow: fewer labels, still in order and inside the range.
    const narrow = stripTicks(1, 6000, 200);
    expect(narrow.length).toBeLessThan(8);
    expect(narrow.every((s, i) => s >= 1 && s <= 6000 && (i === 0 || s > narrow[i - 1]!))).toBe(true);
    expect(stripTicks(0, 10, 800)).toEqual([]);
  });

  it('formats axis ticks and values short: scientific form for very large or small, marks for non-finite', () => {
    // A diverged run's weight travel of 1e31 used to read "9999999e+30" on the compare view's axis.
    expect(formatNumber(1e31)).toBe('1.0e+31');
    expect(formatNumber(9_999_999)).toBe('1.0e+7');
    expect(formatNumber(-2.5e-5)).toBe('-2.5e-5');
    expect(formatNumber(123_456)).toBe('123456');
    expect(formatNumber(123.456)).toBe('123');
    expect(formatNumber(3.14159)).toBe('3.14');
    expect(formatNumber(0)).toBe('0');
    expect(formatNumber(Number.NaN)).toBe('—');
    expect(formatNumber(Infinity)).toBe('∞');
    expect(formatNumber(-Infinity)).toBe('−∞');
  });

  it('reports the latest advice and keeps the caution about held-out data', () => {
    const m = (detected_step: number, verdict: string): Marker => ({ run: 'r', layer: null, kind: 'advice', step: detected_step, detected_step, confidence: 1, details: { verdict, reason: `r${detected_step}` } });
    expect(latestAdvice([])).toEqual({ verdict: 'continue', reason: null, step: null });
    const a = latestAdvice([m(50, 'stop'), m(10, 'may-stop')]);
    expect(a).toEqual({ verdict: 'stop', reason: 'r50', step: 50 });
    expect(adviceSentence(a)).toContain('since step 50');
    expect(adviceSentence(latestAdvice([]))).toContain('keep training');
    // A continue with its reason (the monitor writes one at the first advice and at each new stage) shows it.
    const cont = latestAdvice([{ run: 'r', layer: null, kind: 'advice', step: 8, detected_step: 8, confidence: 1, details: { verdict: 'continue', stage: 'network-drift', reason: 'The network is still drifting.' } }]);
    expect(adviceSentence(cont)).toBe('Stop advice: keep training (since step 8). Reason: The network is still drifting.');
    // A reason that ends in a full stop (as the advisor writes them) gets one full stop, not two.
    const ended = adviceSentence({ verdict: 'may-stop', reason: 'Confirm on held-out data before stopping.', step: 7 });
    expect(ended).toMatch(/Reason: Confirm on held-out data before stopping\.$/);
    expect(ended).not.toContain('..');
    expect(CAUTION).toMatch(/estimates.*held-out data/);
  });

  it('styles layers from the Okabe & Ito palette, changing dash once the colours run out', () => {
    expect(layerStyle(0)).toEqual({ stroke: OKABE_ITO.blue, dash: [] });
    expect(layerStyle(7).stroke).toBe(OKABE_ITO.blue);
    expect(layerStyle(7).dash).not.toEqual([]);
    expect(new Set(Array.from({ length: 7 }, (_, i) => layerStyle(i).stroke)).size).toBe(7);
  });

  it('builds phase rows from drift-start / diffusion-start markers, network first, undetermined before the first', () => {
    const mk = (layer: string | null, kind: Marker['kind'], step: number, detected_step = step): Marker => ({ run: 'r', layer, kind, step, detected_step, confidence: 0.8, details: {} });
    const rows = phaseRows(
      ['a', 'b', 'c'],
      [mk('a', 'diffusion-start', 300, 320), mk('a', 'drift-start', 20, 40), mk(null, 'diffusion-start', 500), mk('b', 'nonfinite', 50), mk('c', 'drift-start', 2)],
      10,
      1000,
    );
    expect(rows.map((r) => r.label)).toEqual(['(network)', 'a', 'b', 'c']);
    expect(rows[0]!.segments).toEqual([
      { from: 10, to: 500, phase: 'undetermined' },
      { from: 500, to: 1000, phase: 'diffusion' },
    ]);
    expect(rows[1]!.segments).toEqual([
      { from: 10, to: 20, phase: 'undetermined' },
      { from: 20, to: 300, phase: 'drift' },
      { from: 300, to: 1000, phase: 'diffusion' },
    ]);
    expect(rows[1]!.ticks.map((t) => t.kind)).toEqual(['drift-start', 'diffusion-start']);
    // A nonfinite marker is not a phase change; a marker before the axis start clamps to it.
    expect(rows[2]!.segments).toEqual([{ from: 10, to: 1000, phase: 'undetermined' }]);
    expect(rows[2]!.ticks).toEqual([]);
    expect(rows[3]!.segments).toEqual([{ from: 10, to: 1000, phase: 'drift' }]);
  });

  it('gives weight travel columns with slope-1 and slope-½ lines through the network anchor, and the latest exponents', () => {
    const run = fakeRun({ id: 'r' });
    const ws = fakeWindows(run, 9, 3, false);
    const cols = travelColumns(
      run.layers.map((l) => l.name),
      ws,
    );
    expect(cols.steps).toEqual([8, 16, 24, 32, 40, 48, 56, 64, 72]);
    expect(cols.labels.at(-1)).toBe('(network)');
    expect(cols.series[0]![2]).toBeCloseTo(ws[2]!.layers.dense_Dense1!.weight_travel, 12);
    // Anchor: the window nearest the geometric middle sqrt(8·72) = 24.
    expect(cols.anchor).toEqual({ step: 24, travel: ws[2]!.network.weight_travel });
    const a = cols.anchor!;
    expect(cols.slope1[8]! / a.travel).toBeCloseTo(72 / 24, 12);
    expect(cols.slopeHalf[8]! / a.travel).toBeCloseTo(Math.sqrt(72 / 24), 12);
    expect(cols.slope1[2]).toBeCloseTo(a.travel, 12);
    expect(cols.exponents[0]).toBe(ws[8]!.layers.dense_Dense1!.travel_exponent);
    expect(cols.exponents[3]).toBe(ws[8]!.network.travel_exponent);
    // Too few windows: no exponent yet; zero travel cannot sit on a log axis.
    const early = travelColumns(['dense_Dense1'], [{ ...ws[0]!, layers: { dense_Dense1: { ...ws[0]!.layers.dense_Dense1!, weight_travel: 0 } } }]);
    expect(early.exponents).toEqual([null, null]);
    expect(early.series[0]).toEqual([null]);
  });

  it('gives loss columns with val_loss only where an epoch ended', () => {
    const ws = fakeWindows(fakeRun({ id: 'r' }), 12);
    const cols = lossColumns(ws);
    expect(cols.hasVal).toBe(true);
    expect(cols.valLoss.filter((v) => v !== null)).toEqual([1.1 / 10]);
    expect(cols.valLoss[9]).toBeCloseTo(0.11, 12);
    expect(cols.loss[6]).toBeNull(); // NaN in window 6
    expect(cols.loss[0]).toBeCloseTo(ws[0]!.logs.loss!, 12);
    expect(lossColumns(ws.slice(0, 5)).hasVal).toBe(false);
  });

  it('states what the noise scale implies against the batch size, as an estimate', () => {
    const ws = fakeWindows(fakeRun({ id: 'r' }), 6, 2, false);
    const set = (v: (number | null)[], batch: number | null) => ws.map((w, i) => ({ ...w, batch_size: batch, network: { ...w.network, noise_scale: v[i] ?? null } }));
    const high = noiseSentence(noiseColumns(set([1, 500, 400, 300, 200, 100], 32)));
    expect(high).toContain('McCandlish et al. 2018');
    // Steps 8–48: the latest stretch is steps ≥ 24, whose values 400, 300, 200, 100 have the median 250.
    expect(high).toContain('Median of the last 4 measurements (steps 24–48): about 250 examples');
    expect(high).toContain('above the batch size of 32');
    expect(high).toMatch(/estimate/);
    expect(noiseSentence(noiseColumns(set([10, 10, 10, 10, 10, 10], 64)))).toContain('below the batch size of 64');
    expect(noiseSentence(noiseColumns(set([40, 40, 40, 40, 40, 40], 32)))).toContain('close to the batch size of 32');
    expect(noiseSentence(noiseColumns(set([null, null, null, null, null, null], 32)))).toContain('No estimate yet');
    expect(noiseSentence(noiseColumns(set([5, 5, 5, 5, 5, 5], null)))).toContain('batch size is unknown');
    const cols = noiseColumns(set([-1, 0, 3, null, 5, 6], 32));
    expect(cols.noise).toEqual([null, null, 3, null, 5, 6]);
    // An unresolved latest measurement is read as its lower bound, not skipped for an earlier value.
    const unresolved = set([10, 10, 10, 10, 10, null], 32).map((w, i) => (i === 5 ? { ...w, noise: { status: 'unresolved' as const, reason: 'lost in the noise', groups: 8, group_rows: 64, rows: 512, population: 3200, ms: 30, noise_scale_low: 700 } } : w));
    const lowCols = noiseColumns(unresolved);
    expect(lowCols.low).toEqual([null, null, null, null, null, 700]);
    expect(noiseSentence(lowCols)).toContain('the noise scale is above about 700 examples, well above the batch size of 32');
  });

  it('collects the information trajectory per layer in step order, flagging saturated windows', () => {
    const run = fakeRun({ id: 'r' });
    const ws = fakeWindows(run, 4, 1, false);
    expect(infoTrajectories(['dense_Dense1'], ws)).toEqual([]);
    const probed = ws.map((w, i) => ({
      ...w,
      layers: { ...w.layers, dense_Dense2: { ...w.layers.dense_Dense2!, mi_input: 5 - i, mi_label: 0.1 * i, mi_saturated: i === 0 ? 1 : 0 } },
    }));
    const t = infoTrajectories(
      run.layers.map((l) => l.name),
      [probed[3]!, probed[1]!, probed[0]!, probed[2]!],
    );
    expect(t).toHaveLength(1);
    expect(t[0]!.label).toBe('dense_Dense2');
    expect(t[0]!.index).toBe(1);
    expect(t[0]!.points.map((p) => p.step)).toEqual([8, 16, 24, 32]);
    expect(t[0]!.points.map((p) => p.saturated)).toEqual([true, false, false, false]);
    // Binned points carry no pairwise extras; the age of step 24 between steps 8 and 32 on a log scale is
    // ln(24/8)/ln(32/8) = log4(3) = 0.792481 (worked by hand).
    expect(t[0]!.points[2]).toMatchObject({ step: 24, x: 3, y: 0.2, saturated: false, lower: null, noiseVariance: null });
    expect(t[0]!.points[2]!.age).toBeCloseTo(0.792481, 6);
    expect(t[0]!.points.map((p) => p.age)[0]).toBe(0);
    expect(t[0]!.points.map((p) => p.age)[3]).toBe(1);
  });

  it('merges windows by step in step order, keeping the first copy, and counts those in a range', () => {
    const ws = fakeWindows(fakeRun({ id: 'm1' }), 10, 1, false);
    const thinned = [ws[0]!, ws[4]!, ws[9]!];
    const merged = mergeWindows(thinned, [ws[5]!, ws[4]!, ws[3]!]);
    expect(merged.map((w) => w.step)).toEqual([8, 32, 40, 48, 80]);
    expect(merged[2]).toBe(ws[4]); // the copy already held
    // A live window after the last is appended.
    expect(mergeWindows(ws.slice(0, 9), [ws[9]!]).map((w) => w.step)).toEqual(ws.map((w) => w.step));
    expect(mergeWindows(ws, [])).toBe(ws);
    // windowsIn counts inclusive ranges by binary search: steps 8, 16, …, 80.
    expect(windowsIn(ws, 16, 40)).toBe(4);
    expect(windowsIn(ws, 17, 39)).toBe(2);
    expect(windowsIn(ws, 0, 1000)).toBe(10);
    expect(windowsIn(ws, 90, 100)).toBe(0);
    expect(windowsIn(ws, 40, 16)).toBe(0);
  });

  it('aligns overlaid runs by step: undefined where a run has no window, null where its value is not finite', () => {
    const a = fakeWindows(fakeRun({ id: 'o1' }), 3, 1, false); // steps 8, 16, 24
    const b = fakeWindows(fakeRun({ id: 'o2' }), 2, 2, false).map((w, i) => ({ ...w, step: 12 + 12 * i })); // steps 12, 24
    b[0] = { ...b[0]!, network: { ...b[0]!.network, grad_snr_db: Number.NaN } };
    const cols = overlayColumns([a, b], (w) => w.network.grad_snr_db);
    expect(cols.steps).toEqual([8, 12, 16, 24]);
    expect(cols.series[0]).toEqual([a[0]!.network.grad_snr_db, undefined, a[1]!.network.grad_snr_db, a[2]!.network.grad_snr_db]);
    expect(cols.series[1]).toEqual([undefined, null, undefined, b[1]!.network.grad_snr_db]);
  });

  it('names the phase a row ends in', () => {
    const run = fakeRun({ id: 'p1' });
    const marker = (kind: Marker['kind'], step: number): Marker => ({ run: run.id, layer: null, kind, step, detected_step: step, confidence: 1, details: {} });
    expect(currentPhase(phaseRows([], [], 1, 100)[0]!)).toBe('undetermined');
    expect(currentPhase(phaseRows([], [marker('drift-start', 5)], 1, 100)[0]!)).toBe('drift');
    expect(currentPhase(phaseRows([], [marker('drift-start', 5), marker('diffusion-start', 50)], 1, 100)[0]!)).toBe('diffusion');
  });

  it('labels compared runs by name, adding the differing tags (or the id) where names repeat', () => {
    const runs: { id: string; name: string; tags: Record<string, string> }[] = [
      { id: 'aaaaaaaa-1', name: 'gearbox', tags: { lr: '0.01', seed: '1' } },
      { id: 'bbbbbbbb-2', name: 'gearbox', tags: { lr: '0.05', seed: '1' } },
      { id: 'cccccccc-3', name: 'other', tags: {} },
    ];
    expect(compareLabels(runs)).toEqual(['gearbox (lr=0.01)', 'gearbox (lr=0.05)', 'other']);
    expect(compareLabels([runs[2]!, { ...runs[2]!, id: 'dddddddd-4' }])).toEqual(['other (cccccccc)', 'other (dddddddd)']);
    // Two of six alike in name and tags (a repeated seed) still get labels of their own.
    const six: { id: string; name: string; tags: Record<string, string> }[] = [
      { id: 'aaaaaaaa-1', name: 'gearbox', tags: { lr: '0.01' } },
      { id: 'bbbbbbbb-2', name: 'gearbox', tags: { lr: '0.01' } },
      { id: 'cccccccc-3', name: 'gearbox', tags: { lr: '0.05' } },
      { id: 'dddddddd-4', name: 'other', tags: {} },
      { id: 'eeeeeeee-5', name: 'other', tags: {} },
      { id: 'eeeeeeee-6', name: 'other', tags: {} },
    ];
    const labels = compareLabels(six);
    expect(new Set(labels).size).toBe(6);
    expect(labels.slice(0, 3)).toEqual(['gearbox (lr=0.01) · aaaaaaaa', 'gearbox (lr=0.01) · bbbbbbbb', 'gearbox (lr=0.05)']);
    expect(labels.slice(3)).toEqual(['other (dddddddd)', 'other (eeeeeeee-5)', 'other (eeeeeeee-6)']);
  });

  it('gives a wide model and a shared page fewer windows, within 200 to 2,000', () => {
    expect(windowBudget(1)).toBe(2000);
    expect(windowBudget(10)).toBe(2000); // 25,000 / 11 = 2,273, capped
    expect(windowBudget(50)).toBe(490); // 25,000 / 51
    expect(windowBudget(4, 2)).toBe(2000); // 25,000 / 5 / 2 = 2,500, capped
    expect(windowBudget(50, 6)).toBe(200); // floor
    expect(windowBudget(20, 3)).toBe(397); // 25,000 / 21 / 3
  });
});

describe('levelColumns', () => {
  it('gives the phase detector\'s level: K·(‖m‖²/σ² − floor²) in dB (docs/methods.md), null without grad_diff_norm', () => {
    const [w] = fakeWindows(fakeRun({ id: 'lv' }), 1, 3, false);
    const layer = Object.keys(w!.layers)[0]!;
    const win = {
      ...w!,
      batches: 10,
      snr_floor: Math.sqrt(0.005),
      layers: { [layer]: { ...w!.layers[layer]!, batches: 10, grad_mean_norm: Math.sqrt(0.5), grad_diff_norm: 1 } },
      network: { ...w!.network, grad_diff_norm: undefined },
    };
    const cols = levelColumns([layer], [win]);
    // 10·(0.5 − 0.005) = 4.95 → 10·log10(4.95) dB [computed by hand].
    expect(cols.series[0]![0]).toBeCloseTo(10 * Math.log10(4.95), 10);
    expect(cols.series[1]![0]).toBeNull();
    expect(cols.labels).toEqual([layer, '(network)']);
  });
});


describe('information plane model', () => {
  const run = fakeRun({ id: 'plane' });
  const names = run.layers.map((l) => l.name);
  /** What the probe's describe() writes into config.probe, with the noise scaled to each layer. */
  const config = {
    probe: {
      rows: 1024,
      every: 'auto',
      budget: 0.03,
      labels: { kind: 'classes', classes: 3 },
      binned: { estimator: 'binned-plugin', bins: 30, saturation_margin_bits: 0.1 },
      bounds: { estimator: 'pairwise-kolchinsky-tracey', noise_variance: null, noise_ratio: 0.2, rows: 512 },
    },
  };
  type Probe = Partial<Record<'mi_input' | 'mi_label' | 'mi_saturated' | 'mi_input_upper' | 'mi_input_lower' | 'mi_label_pairwise' | 'mi_label_linear' | 'mi_bounds_saturated' | 'mi_noise_variance' | 'probe_rows', number>>;
  /** Windows at steps 8, 16, …, 40; `probe[i][layer]` joins window i's layer (the third layer is never probed). */
  const windowsWith = (probe: Record<number, Record<string, Probe>>) =>
    fakeWindows(run, 5, 1, false).map((w, i) => ({
      ...w,
      layers: Object.fromEntries(Object.entries(w.layers).map(([name, s]) => [name, { ...s, ...(probe[i]?.[name] ?? {}) }])),
    }));
  // The demo's picture in small: the wide hidden layer's binned estimate saturated at log2 1024 = 10 bits in every
  // probe window, its pairwise estimate moving; the second layer's pairwise estimate saturated in the first window.
  const hidden = (upper: number, lower: number, label: number, variance: number): Probe => ({
    mi_input: 10,
    mi_label: 1.5,
    mi_saturated: 1,
    probe_rows: 1024,
    mi_input_upper: upper,
    mi_input_lower: lower,
    mi_label_pairwise: label,
    mi_bounds_saturated: 0,
    mi_noise_variance: variance,
  });
  const out = (x: number, y: number, upper: number, label: number, sat: number): Probe => ({
    mi_input: x,
    mi_label: y,
    mi_saturated: 0,
    probe_rows: 1000,
    mi_input_upper: upper,
    mi_input_lower: upper - 1,
    mi_label_pairwise: label,
    mi_bounds_saturated: sat,
    mi_noise_variance: 0.5,
  });
  const probed = windowsWith({
    0: { dense_Dense1: hidden(6.5, 5, 0.5, 0.04), dense_Dense2: out(3, 0.25, 9, 0.1, 1) },
    2: { dense_Dense1: hidden(5.75, 4.5, 1, 0.05), dense_Dense2: out(2.5, 0.75, 4, 0.9, 0) },
    4: { dense_Dense1: hidden(5.25, 4, 1.25, 0.0625), dense_Dense2: out(2, 1, 3.5, 1.2, 0) },
  });

  it('reads the estimators and their settings from config.probe, and null where it does not say', () => {
    expect(planeSettings(config)).toEqual({ bins: 30, rows: 1024, marginBits: 0.1, pairwise: { noiseVariance: null, relative: 0.2, rows: 512 }, linear: null, classes: 3 });
    expect(planeSettings({})).toEqual({ bins: null, rows: null, marginBits: null, pairwise: null, linear: null, classes: null });
    // Bounds turned off (boundRows 0) write bounds: null; values of the wrong type are not taken.
    expect(planeSettings({ probe: { rows: '1024', binned: { bins: Number.NaN }, bounds: null, labels: [] } })).toEqual({ bins: null, rows: null, marginBits: null, pairwise: null, linear: null, classes: null });
    expect(planeSettings({ probe: { linear: { estimator: 'linear-probe-barber-agakov', rows: 512, folds: 2 } } }).linear).toEqual({ rows: 512, folds: 2 });
    expect(planeSettings({ probe: { bounds: { noise_variance: 0.1, rows: 256 } } }).pairwise).toEqual({ noiseVariance: 0.1, relative: null, rows: 256 });
  });

  it('plots the pairwise estimate by default: mi_input_upper across, mi_label_pairwise up, its own saturation flag', () => {
    const plane = infoPlane(names, [probed[4]!, probed[0]!, probed[2]!, probed[1]!], 'pairwise', planeSettings(config));
    expect(plane.estimator).toBe('pairwise');
    expect(plane.requested).toBe('pairwise');
    expect(plane.available).toEqual({ pairwise: true, linear: false, binned: true });
    expect(plane.left).toBe(0);
    // The pairwise estimate is capped at log2 of the bound's rows (512), not of the probe's 1024.
    expect(plane.rows).toBe(512);
    expect(plane.labelCeiling).toBeCloseTo(1.5849625, 6); // log2 3, from memory
    // The never-probed third layer is left out; the others keep their index (their colour).
    expect(plane.trajectories.map((t) => [t.label, t.index])).toEqual([
      ['dense_Dense1', 0],
      ['dense_Dense2', 1],
    ]);
    const [a, b] = plane.trajectories;
    expect(a!.points.map((p) => p.step)).toEqual([8, 24, 40]);
    expect(a!.points.map((p) => p.x)).toEqual([6.5, 5.75, 5.25]);
    expect(a!.points.map((p) => p.y)).toEqual([0.5, 1, 1.25]);
    expect(a!.points.map((p) => p.lower)).toEqual([5, 4.5, 4]);
    expect(a!.points.map((p) => p.noiseVariance)).toEqual([0.04, 0.05, 0.0625]);
    // The binned saturation of the hidden layer does not mark its pairwise points; the bounds' own flag does.
    expect(a!.points.map((p) => p.saturated)).toEqual([false, false, false]);
    expect(b!.points.map((p) => p.saturated)).toEqual([true, false, false]);
    expect(b!.points.map((p) => p.x)).toEqual([9, 4, 3.5]);
    // Start and end: age 0 at the first probe step, 1 at the last; step 24 between 8 and 40 on a log scale is
    // ln 3 / ln 5 = 0.682606 (worked by hand), the same in both layers.
    expect(a!.points.map((p) => p.age)).toEqual([0, expect.closeTo(0.682606, 6), 1]);
    expect(b!.points.map((p) => p.age)).toEqual(a!.points.map((p) => p.age));
  });

  it('plots the binned pair when asked, with the binned saturation flag and rows', () => {
    const plane = infoPlane(names, probed, 'binned', planeSettings(config));
    expect(plane.estimator).toBe('binned');
    expect(plane.rows).toBe(1024); // the largest probe_rows of a drawn window
    const [a, b] = plane.trajectories;
    expect(a!.points.map((p) => [p.x, p.y, p.saturated])).toEqual([
      [10, 1.5, true],
      [10, 1.5, true],
      [10, 1.5, true],
    ]);
    expect(b!.points.map((p) => [p.x, p.y, p.saturated, p.lower, p.noiseVariance])).toEqual([
      [3, 0.25, false, null, null],
      [2.5, 0.75, false, null, null],
      [2, 1, false, null, null],
    ]);
  });

  it('falls back to the binned pair for windows without the pairwise one, and says so', () => {
    const binnedOnly = windowsWith({ 1: { dense_Dense2: { mi_input: 4, mi_label: 0.5, mi_saturated: 0, probe_rows: 256 } }, 3: { dense_Dense2: { mi_input: 3, mi_label: 0.75, mi_saturated: 0, probe_rows: 256 } } });
    const settings = planeSettings({ probe: { rows: 256, binned: { bins: 12 }, bounds: null } });
    const plane = infoPlane(names, binnedOnly, 'pairwise', settings);
    expect(plane.requested).toBe('pairwise');
    expect(plane.estimator).toBe('binned');
    expect(plane.available).toEqual({ pairwise: false, linear: false, binned: true });
    expect(plane.trajectories.map((t) => t.points.map((p) => [p.step, p.x, p.y]))).toEqual([
      [
        [16, 4, 0.5],
        [32, 3, 0.75],
      ],
    ]);
    expect(planeSentence(plane, settings)).toBe(
      "This run's probe windows hold no pairwise estimate (recorded before it, or with the bounds turned off), so the plane shows the binned one. " +
        'Binned plug-in estimate with 12 equal-width bins per unit over 256 probe rows, capped at log2 256 = 8 bits; ' +
        'a window is saturated (a hollow grey ring) when H(T) is within 0.1 bit of that cap: every probe example has its own bin and the value says nothing.',
    );
    // The other way round: asked for binned, a run holding only the pairwise pair shows that.
    const pairwiseOnly = windowsWith({ 2: { dense_Dense1: { mi_input_upper: 3, mi_label_pairwise: 0.5, mi_bounds_saturated: 0 } } });
    const other = infoPlane(names, pairwiseOnly, 'binned');
    expect(other.estimator).toBe('pairwise');
    expect(planeSentence(other, planeSettings({}))).toMatch(/^This run's probe windows hold no binned estimate, so the plane shows the pairwise one\. Kolchinsky–Tracey/);
    // No probe at all: nothing to draw, and the estimator asked for stays.
    const none = infoPlane(names, windowsWith({}), 'pairwise');
    expect(none.trajectories).toEqual([]);
    expect(none.estimator).toBe('pairwise');
    expect(none.available).toEqual({ pairwise: false, linear: false, binned: false });
  });

  it('plots the linear read-out bound up against the noisy I(X;T) across when asked, and falls back to pairwise without it', () => {
    // The layers' windows 2 and 4 hold the linear bound; window 0 predates it.
    const linear = windowsWith({
      0: { dense_Dense1: hidden(6.5, 5, 0.5, 0.04) },
      2: { dense_Dense1: { ...hidden(5.75, 4.5, 1, 0.05), mi_label_linear: 1.3 } as Probe },
      4: { dense_Dense1: { ...hidden(5.25, 4, 1.25, 0.0625), mi_label_linear: 1.55 } as Probe },
    });
    const settings = planeSettings({ ...config, probe: { ...(config.probe as object), linear: { estimator: 'linear-probe-barber-agakov', rows: 512, folds: 2 } } });
    const plane = infoPlane(names, linear, 'linear', settings);
    expect(plane.estimator).toBe('linear');
    expect(plane.available).toEqual({ pairwise: true, linear: true, binned: true });
    expect(plane.trajectories[0]!.points.map((p) => [p.step, p.x, p.y])).toEqual([
      [24, 5.75, 1.3],
      [40, 5.25, 1.55],
    ]);
    expect(plane.left).toBe(1);
    expect(plane.rows).toBe(512);
    expect(planeSentence(plane, settings)).toBe(
      'Up: a lower bound on I(T;Y) from a linear read-out of the layer (Barber–Agakov, a softmax regression scored on 512 probe rows it was not fitted to, 2 folds): ' +
        'no noise is added and it cannot saturate, but it misses what a linear map cannot reach. ' +
        "Across: the Kolchinsky–Tracey KL-based estimate of I(X;T) with Gaussian noise σ² = 0.05 to 0.0625 across layers and windows (0.2 × the layer's spread, the total variance of its activations), capped at log2 512 = 9 bits. " +
        '1 layer-window without this estimate is not drawn.',
    );
    // A run recorded before the linear read-out: asked for it, the plane shows the pairwise estimate and says why.
    const before = infoPlane(names, probed, 'linear', planeSettings(config));
    expect(before.estimator).toBe('pairwise');
    expect(planeSentence(before, planeSettings(config))).toMatch(/^This run's probe windows hold no linear read-out \(recorded before it, or with it turned off\), so the plane shows the pairwise one\. Kolchinsky–Tracey/);
  });

  it('leaves out, and counts, the windows that hold only the other estimator', () => {
    // The first probe window predates the pairwise estimate (binned only); the later ones hold both.
    const mixed = windowsWith({
      0: { dense_Dense1: { mi_input: 10, mi_label: 1.5, mi_saturated: 1 }, dense_Dense2: { mi_input: 3, mi_label: 0.25, mi_saturated: 0 } },
      2: { dense_Dense1: hidden(5.75, 4.5, 1, 0.05), dense_Dense2: out(2.5, 0.75, 4, 0.9, 0) },
      4: { dense_Dense1: hidden(5.25, 4, 1.25, 0.0625), dense_Dense2: out(2, 1, 3.5, 1.2, 0) },
    });
    const plane = infoPlane(names, mixed, 'pairwise', planeSettings(config));
    expect(plane.estimator).toBe('pairwise');
    expect(plane.left).toBe(2);
    expect(plane.trajectories.map((t) => t.points.map((p) => p.step))).toEqual([
      [24, 40],
      [24, 40],
    ]);
    expect(planeSentence(plane, planeSettings(config))).toMatch(/ 2 layer-windows without this estimate are not drawn\.$/);
    expect(infoPlane(names, mixed, 'binned').left).toBe(0);
    // One probe window in all: its point is the start and the end, drawn at full size.
    const single = infoPlane(names, windowsWith({ 3: { dense_Dense1: hidden(5, 4, 1, 0.05) } }), 'pairwise');
    expect(single.trajectories[0]!.points).toEqual([{ step: 32, x: 5, y: 1, saturated: false, lower: 4, noiseVariance: 0.05, age: 1 }]);
  });

  it('names the pairwise estimator with the σ² it stored, its share of the spread, the rows and the cap', () => {
    const settings = planeSettings(config);
    expect(planeSentence(infoPlane(names, probed, 'pairwise', settings), settings)).toBe(
      "Kolchinsky–Tracey pairwise estimate with Gaussian noise σ² = 0.04 to 0.5 across layers and windows (0.2 × the layer's spread, the total variance of its activations) over 512 probe rows; " +
        'an estimate of a noise-regularised quantity, capped at log2 512 = 9 bits. Across: the KL-based estimate of I(X;T); up: the matching estimate of I(T;Y).',
    );
    // One σ² everywhere is given once.
    const same = windowsWith({ 0: { dense_Dense1: hidden(6, 5, 0.5, 0.25) }, 1: { dense_Dense1: hidden(5, 4, 1, 0.25) } });
    expect(planeSentence(infoPlane(names, same, 'pairwise', settings), settings)).toContain('Gaussian noise σ² = 0.25 (0.2 × the layer');
    // Windows without mi_noise_variance (the noise was one absolute σ²): the config's value, said to be absolute.
    const absolute = planeSettings({ probe: { rows: 300, bounds: { estimator: 'pairwise-kolchinsky-tracey', noise_variance: 0.1, rows: 300 } } });
    const old = windowsWith({ 0: { dense_Dense1: { mi_input_upper: 8.2, mi_label_pairwise: 1, mi_bounds_saturated: 0 } } });
    expect(planeSentence(infoPlane(names, old, 'pairwise', absolute), absolute)).toBe(
      'Kolchinsky–Tracey pairwise estimate with Gaussian noise σ² = 0.1 (one absolute value for every layer) over 300 probe rows; ' +
        'an estimate of a noise-regularised quantity, capped at log2 300 = 8.23 bits. Across: the KL-based estimate of I(X;T); up: the matching estimate of I(T;Y).',
    );
    // Nothing recorded: says so rather than guessing.
    expect(planeSentence(infoPlane(names, old, 'pairwise'), planeSettings({}))).toContain('Gaussian noise σ² not recorded over the probe rows; an estimate of a noise-regularised quantity, capped at log2 of the rows.');
  });

  it('keeps the estimator in the URL fragment beside the step range and the token', () => {
    expect(planeOf('#/run/abc')).toBe('pairwise');
    expect(planeOf('#/run/abc?steps=8-800&plane=binned')).toBe('binned');
    expect(planeOf('#/run/abc?plane=nonsense')).toBe('pairwise');
    expect(planeOf('#/run/abc?plane=linear')).toBe('linear');
    expect(withPlane('#/run/abc?steps=8-800&token=t-1', 'binned')).toBe('#/run/abc?steps=8-800&token=t-1&plane=binned');
    expect(withPlane('#/run/abc?steps=8-800&plane=binned', 'pairwise')).toBe('#/run/abc?steps=8-800');
    expect(withPlane('#/run/abc?plane=binned', 'pairwise')).toBe('#/run/abc');
    // A zoom keeps the estimator, and the route is the same with or without it.
    expect(withRange('#/run/abc?plane=binned', { min: 16, max: 400 })).toBe('#/run/abc?plane=binned&steps=16-400');
    expect(parseRoute('#/run/abc?plane=binned&steps=16-400')).toEqual({ view: 'run', id: 'abc', range: { min: 16, max: 400 } });
  });

  it('writes settings in three significant digits without trailing zeros', () => {
    expect([0.2, 0.0625, 0.1, 30, 0.123456, 1234.5].map(settingText)).toEqual(['0.2', '0.0625', '0.1', '30', '0.123', '1230']);
    expect(settingText(2e-5)).toBe('2.0e-5');
  });

  it('tints a colour towards white for the early markers', () => {
    // Okabe & Ito blue #0072B2 halfway to white: 0 + 255/2 = 127.5 → 128 (0x80), 114 + 70.5 → 185 (0xb9), 178 + 38.5 → 217 (0xd9); by hand.
    expect(tint('#0072B2', 0.5)).toBe('#80b9d9');
    expect(tint('#0072B2', 0)).toBe('#0072b2');
    expect(tint('#E69F00', 1)).toBe('#ffffff');
    expect(tint('#E69F00', 2)).toBe('#ffffff');
    expect(tint('not a colour', 0.5)).toBe('not a colour');
  });
});
