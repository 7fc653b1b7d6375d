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
  infoTrajectories,
  latestAdvice,
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
    expect(high).toContain('about 300 examples');
    expect(high).toContain('above the batch size of 32');
    expect(high).toMatch(/estimate/);
    expect(noiseSentence(noiseColumns(set([10, 10, 10, 10, 10, 10], 64)))).toContain('below the batch size of 64');
    expect(noiseSentence(noiseColumns(set([40, 40, 40, 40, 40, 40], 32)))).toContain('close to the batch size of 32');
    expect(noiseSentence(noiseColumns(set([null, null, null, null, null, null], 32)))).toContain('No estimate yet');
    expect(noiseSentence(noiseColumns(set([5, 5, 5, 5, 5, 5], null)))).toContain('batch size is unknown');
    const cols = noiseColumns(set([-1, 0, 3, null, 5, 6], 32));
    expect(cols.noise).toEqual([null, null, 3, null, 5, 6]);
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
    expect(t[0]!.points[2]).toEqual({ step: 24, x: 3, y: 0.2 * 1, saturated: false });
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

