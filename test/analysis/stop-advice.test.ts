import { describe, expect, it } from 'vitest';
import { detectPhases, type PhaseName, type PhaseSnapshot } from '../../src/analysis/phase-detector.js';
import { ADVICE_DEFAULTS, adviceChanged, adviseStop, doublingGain, StopAdvisor, type Advice, type AdviceInput } from '../../src/analysis/stop-advice.js';
import { mulberry32 } from '../helpers/random.js';
import { NOISE_DB, snrSeries, spreadDrop, switchAt, constantSnr } from '../helpers/snr-series.js';

// The policy (src/analysis/stop-advice.ts): never advise stopping while the network or a layer drifts or is
// undetermined; once all diffuse, wait for the diffusion to last as long as the drift; then a trend test on the
// watched quantity (validation accuracy, else val_loss, else loss): least squares against ln(step) over the last
// doubling of the training, may-stop when the one-sided 95 % upper bound of the gain per doubling is below
// minGain of what is left to gain, stop when that has held for `patience` values in a row (and the diffusion has
// lasted twice the drift). The thresholds are rules of thumb (common practice,
// no source); the interval is the textbook simple-regression one (methods.md §9, checked there against
// scipy.stats.linregress).

const snap = (network: PhaseName, networkSince: number | null, layers: Record<string, PhaseName> = {}): PhaseSnapshot => ({
  network,
  layers,
  since: Object.fromEntries(Object.keys(layers).map((l) => [l, networkSince])),
  networkSince,
});

/** Windows of 100 steps; the network drifts from step 1, diffuses from step 1000 (detected at 1300). */
function script(windows: number, loss: (i: number) => Record<string, number>): { inputs: AdviceInput[]; states: PhaseSnapshot[] } {
  const inputs: AdviceInput[] = [];
  const states: PhaseSnapshot[] = [];
  for (let i = 0; i < windows; i++) {
    const step = 100 * (i + 1);
    inputs.push({ step, logs: loss(i) });
    states.push(step < 300 ? snap('undetermined', null) : step < 1300 ? snap('drift', 1) : snap('diffusion', 1000));
  }
  return { inputs, states };
}

const firstStep = (advice: readonly Advice[], verdict: Advice['verdict']): number | null => advice.find((a) => a.verdict === verdict)?.step ?? null;

describe('doublingGain', () => {
  it('reproduces methods.md §9 row 2 (slope 0.49313002361, SE 0.01254280345, df 6) as a gain per doubling with its 95 % bound', () => {
    // x = 1, 2, …, 128 and y = ln(3·x^0.5·e^ε): the slope on ln x is the row's 0.49313002361 [computed with
    // scipy.stats.linregress]; the gain per doubling is slope·ln 2 and its one-sided bound adds t(0.95, 6)·SE·ln 2
    // with t(0.95, 6) = 1.943180 (methods.md §9 table).
    const xs = [1, 2, 4, 8, 16, 32, 64, 128];
    const eps = [0.05, -0.05, 0.05, -0.05, 0.05, -0.05, 0.05, -0.05];
    const ys = xs.map((x, i) => Math.log(3) + 0.5 * Math.log(x) + eps[i]!);
    const g = doublingGain(xs, ys, true)!;
    expect(g.gain).toBeCloseTo(0.49313002361 * Math.LN2, 9);
    expect(g.upper).toBeCloseTo((0.49313002361 + 1.94318 * 0.01254280345) * Math.LN2, 6);
    // Lower is better: the same numbers read as a loss getting worse.
    expect(doublingGain(xs, ys, false)!.gain).toBeCloseTo(-0.49313002361 * Math.LN2, 9);
    expect(doublingGain([1, 2], [1, 2], true)).toBeNull();
  });
});

describe('StopAdvisor (rules of thumb: common practice, no source)', () => {
  it('has the documented defaults: patience 10 values, minGain 0.05, diffusion ratio 1', () => {
    expect(ADVICE_DEFAULTS).toEqual({ patience: 10, minGain: 0.05, diffusionRatio: 1 });
  });

  it('never says may-stop or stop while the network is undetermined or drifting, however flat the loss', () => {
    const a = new StopAdvisor();
    for (let i = 0; i < 600; i++) {
      const phase = i < 100 ? snap('undetermined', null) : snap('drift', 50);
      const advice = a.update({ step: 10 * (i + 1), logs: { loss: 0.5, val_loss: 0.6 } }, phase);
      expect(advice.verdict).toBe('continue');
      expect(advice.reason.length).toBeGreaterThan(20);
    }
  });

  it('never says may-stop or stop while a layer drifts, and names it', () => {
    const a = new StopAdvisor();
    let last: Advice | null = null;
    for (let i = 0; i < 100; i++) last = a.update({ step: 100 * (i + 1), logs: { loss: 1 } }, snap('diffusion', 10, { dense_1: 'diffusion', dense_2: 'drift' }));
    expect(last!.verdict).toBe('continue');
    expect(last!.reason).toMatch(/layer dense_2 still drifts/);
  });

  it('may-stop once diffusion ≥ the drift and the last doubling is flat; stop after 10 flat values in a row', () => {
    // Drift 1 → 1000 (999 steps). The loss falls as 1/i until window 9 (step 1000), then is flat.
    const { inputs, states } = script(60, (i) => ({ loss: 1 / Math.min(i + 1, 10) }));
    const advice = adviseStop(inputs, states);
    // Diffusion reaches 999 steps at step 1999, and the last doubling (steps 1001-2000, 10 values) is flat:
    // may-stop at 2000. Flat from then on, 10 in a row at step 2900; diffusion ≥ 2·999 at 2998: stop at 3000.
    expect(firstStep(advice, 'may-stop')).toBe(2000);
    expect(firstStep(advice, 'stop')).toBe(3000);
    const at = (step: number): Advice => advice.find((a) => a.step === step)!;
    expect(at(1900).verdict).toBe('continue');
    expect(at(1900).reason).toMatch(/waiting for 999 steps/);
    expect(at(2900).verdict).toBe('may-stop');
    expect(at(2000).watched).toBe('loss');
    expect(at(2000).best).toBeCloseTo(0.1, 12);
    expect(at(2000).trend!.values).toBe(10);
    expect(at(2000).trend!.gain).toBeCloseTo(0, 12);
    for (const v of ['may-stop', 'stop'] as const) {
      const r = advice.find((a) => a.verdict === v)!.reason;
      expect(r).toMatch(/confirm on held-out data/);
      // The numbers in the sentence are those of the run: 999 steps of drift, not a placeholder.
      expect(r).toMatch(/the drift before lasted 999 steps/);
    }
    expect(advice.filter((a) => a.step >= 3000).every((a) => a.verdict === 'stop')).toBe(true);
  });

  it('keeps going while a doubling still pays: a loss falling as a power of the step never stops', () => {
    // loss = step^−0.1: a doubling removes 6.7 % of it, more than the 5 % worth having.
    const { inputs, states } = script(200, (i) => ({ loss: (100 * (i + 1)) ** -0.1 }));
    const advice = adviseStop(inputs, states);
    expect(advice.every((a) => a.verdict === 'continue')).toBe(true);
    expect(advice.at(-1)!.reason).toMatch(/another doubling may still gain/);
    // A slower fall, step^−0.01 (0.7 % a doubling), is not worth it: may-stop and then stop.
    const slow = script(200, (i) => ({ loss: (100 * (i + 1)) ** -0.01 }));
    expect(firstStep(adviseStop(slow.inputs, slow.states), 'stop')).not.toBeNull();
  });

  it('watches the validation accuracy when it is logged, as a quantity where higher is better', () => {
    // val_loss rises (over-confidence) while val_acc still climbs by 1 point a doubling, more than 2 % of the
    // 13–20 points left: continue.
    const s = script(120, (i) => ({ loss: 0.1, val_loss: 0.3 + 0.001 * i, val_acc: 0.8 + 0.01 * Math.log2(i + 1) }));
    const advice = adviseStop(s.inputs, s.states);
    expect(advice.at(-1)!.watched).toBe('val_acc');
    expect(advice.every((a) => a.verdict === 'continue')).toBe(true);
    expect(advice.at(-1)!.reason).toMatch(/points/);
    // Flat accuracy: stop, whatever val_loss does.
    const flat = script(120, (i) => ({ val_loss: 0.3 - 0.001 * i, val_accuracy: 0.95 }));
    const flatAdvice = adviseStop(flat.inputs, flat.states);
    expect(flatAdvice.at(-1)!.watched).toBe('val_accuracy');
    expect(firstStep(flatAdvice, 'stop')).not.toBeNull();
  });

  it('watches val_loss over loss when it is logged, even when it arrives only every few windows', () => {
    const onlyEvery3 = script(120, (i): Record<string, number> => (i % 3 === 2 ? { loss: 0.99 ** i, val_loss: 0.7 } : { loss: 0.99 ** i }));
    const advice = adviseStop(onlyEvery3.inputs, onlyEvery3.states);
    expect(advice.slice(2).every((a) => a.watched === 'val_loss')).toBe(true);
    expect(advice[0]!.watched).toBe('loss');
    // Windows without val_loss add no value: the first trend of 10 values needs 30 windows of val_loss.
    const may = advice.find((a) => a.verdict === 'may-stop')!;
    expect(may.trend!.values).toBe(10);
    expect(may.step).toBeGreaterThanOrEqual(3000);
    const improving = script(120, (i) => ({ loss: 0.5, val_loss: 0.95 ** i }));
    expect(adviseStop(improving.inputs, improving.states).every((a) => a.verdict === 'continue')).toBe(true);
  });

  it('honours the watch, patience, minGain and diffusionRatio options', () => {
    const s = script(80, () => ({ loss: 1, val_loss: 1, other: 1 }));
    expect(adviseStop(s.inputs, s.states, { watch: 'other' })[0]!.watched).toBe('other');
    expect(firstStep(adviseStop(s.inputs, s.states, { diffusionRatio: 2 }), 'may-stop')).toBe(3000);
    const slow = script(200, (i) => ({ loss: (100 * (i + 1)) ** -0.01 }));
    expect(firstStep(adviseStop(slow.inputs, slow.states, { minGain: 0.001 }), 'may-stop')).toBeNull();
    // A flat loss: the trend needs `patience` values after half the steps so far: 10 in steps 1001-2000,
    // 20 in steps 1951-3900.
    expect(firstStep(adviseStop(s.inputs, s.states), 'may-stop')).toBe(2000);
    expect(firstStep(adviseStop(s.inputs, s.states, { patience: 20 }), 'may-stop')).toBe(3900);
  });

  it('says so when no drift was seen, instead of inventing one', () => {
    const a = new StopAdvisor();
    let last: Advice | null = null;
    for (let i = 0; i < 40; i++) last = a.update({ step: 100 * (i + 1), logs: { loss: 1 } }, snap('diffusion', 50));
    expect(last!.verdict).toBe('stop');
    expect(last!.reason).toMatch(/no drift phase was seen before/);
    expect(last!.reason).not.toMatch(/\b1 steps\b/);
  });

  it('a new drift resets: continue again, the drift is measured from its new start, and the old history is dropped', () => {
    const a = new StopAdvisor();
    const out: Advice[] = [];
    for (let i = 0; i < 120; i++) {
      const step = 100 * (i + 1);
      // Task 1: drift 1..1000, diffusion from 1000; task 2 from step 5000: drift until 7000, then diffusion.
      const phase =
        step < 300 ? snap('undetermined', null) : step < 1300 ? snap('drift', 1) : step < 5300 ? snap('diffusion', 1000) : step < 7300 ? snap('drift', 5000) : snap('diffusion', 7000);
      // The new task's loss is higher than the old best and flat.
      const loss = step <= 1000 ? 1 / step : step < 5000 ? 1e-3 : 1.3;
      out.push(a.update({ step, logs: { loss } }, phase));
    }
    const at = (step: number): Advice => out.find((x) => x.step === step)!;
    expect(at(4900).verdict).toBe('stop');
    for (let step = 5300; step < 7300; step += 100) expect(at(step).verdict).toBe('continue');
    // New drift 5000 → 7000 (2000 steps): may-stop needs diffusion until 9000, stop until 11 000.
    expect(firstStep(out.filter((x) => x.step > 7000), 'may-stop')).toBe(9000);
    expect(firstStep(out.filter((x) => x.step > 7000), 'stop')).toBe(11_000);
    expect(at(9000).best).toBeCloseTo(1.3, 12);
    expect(at(9000).reason).toMatch(/the drift before lasted 2,000 steps/);
  });

  it('restart() starts the trend over: a stop becomes continue until enough values are flat again', () => {
    const a = new StopAdvisor({ patience: 5 });
    const diffusing = snap('diffusion', 100);
    let last: Advice | null = null;
    for (let i = 0; i < 40; i++) last = a.update({ step: 110 + 10 * i, logs: { loss: 1 } }, diffusing);
    expect(last!.verdict).toBe('stop');
    a.restart();
    const later = Array.from({ length: 10 }, (_, i) => a.update({ step: 600 + 10 * i, logs: { loss: 1 } }, diffusing).verdict);
    // Five values for a trend (step 640), five flat in a row for stop (step 680); no drift was seen, so no wait.
    expect(later).toEqual(['continue', 'continue', 'continue', 'continue', 'may-stop', 'may-stop', 'may-stop', 'may-stop', 'stop', 'stop']);
  });

  it('with a watched name that is never logged says so, with the names that are, and never reports a trend of it', () => {
    const a = new StopAdvisor({ patience: 5, watch: 'val_los' });
    const diffusing = snap('diffusion', 100);
    let last: Advice | null = null;
    for (let i = 0; i < 40; i++) last = a.update({ step: 110 + 10 * i, logs: { loss: 1, val_loss: 1 } }, diffusing);
    expect(last!.verdict).toBe('continue');
    expect(last!.best).toBeNull();
    expect(last!.trend).toBeNull();
    expect(last!.reason).toContain("'val_los' has not appeared in the logs (logged: loss, val_loss), so its trend cannot be judged");
    // The same history watched under its right name gets a trend and a verdict.
    const right = new StopAdvisor({ patience: 5, watch: 'val_loss' });
    for (let i = 0; i < 40; i++) last = right.update({ step: 110 + 10 * i, logs: { loss: 1, val_loss: 1 } }, diffusing);
    expect(last!.verdict).toBe('stop');
  });

  it('names the rule behind each verdict (its stage), and a marker is due at the first advice and at each new verdict or stage', () => {
    const s = script(60, (i) => ({ loss: 1 / (1 + i) }));
    const advice = adviseStop(s.inputs, s.states);
    expect(advice[0]!.stage).toBe('phase-unknown');
    expect(advice.find((a) => a.step === 500)!.stage).toBe('network-drift');
    const changes = advice.filter((a, i) => adviceChanged(i === 0 ? null : advice[i - 1]!, a));
    expect(changes[0]).toBe(advice[0]);
    for (let i = 1; i < changes.length; i++) {
      const before = changes[i - 1]!;
      expect(before.stage !== changes[i]!.stage || before.verdict !== changes[i]!.verdict).toBe(true);
    }
    // Between two changes nothing new: the same verdict and stage.
    expect(advice.length).toBeGreaterThan(changes.length);
  });

  it('with no loss logged it never advises stopping', () => {
    const s = script(80, () => ({}));
    const advice = adviseStop(s.inputs, s.states);
    expect(advice.every((a) => a.verdict === 'continue' && a.watched === null && a.best === null)).toBe(true);
  });
});

describe('the advice on detected phases (synthetic series of phase-detector.test.ts)', () => {
  it('never says stop or may-stop while the detected network phase is not diffusion, and does say stop late in diffusion', () => {
    // Three layers cross 0 dB at their own steps (methods.md §1.4, "layers cross at different times"), then a
    // new task at step 20 000; the loss falls as 1/sqrt(step) until 6000, is flat, and jumps at the new task.
    for (let seed = 1; seed <= 20; seed++) {
      const r = mulberry32(seed);
      const layers = ['a', 'b', 'c'].map((name, i) => ({
        name,
        params: 100 * (i + 1),
        profile: switchAt(20_000, spreadDrop(400 * (i + 1) * (1 + r()), 3 + 2 * r(), -25), constantSnr(6)),
      }));
      const s = snrSeries({ windows: 180, stepsPerEpoch: 128, noiseDb: NOISE_DB.middle, seed, layers });
      const { states } = detectPhases(s.windows);
      const inputs = s.windows.map((w) => ({ step: w.step, logs: { loss: w.step < 20_000 ? 1 / Math.sqrt(Math.min(w.step, 6000)) : 0.5 } }));
      const advice = adviseStop(inputs, states);
      advice.forEach((a, i) => {
        if (states[i]!.network !== 'diffusion') expect(a.verdict, `seed ${seed} step ${a.step}`).toBe('continue');
      });
      expect(advice.some((a) => a.verdict === 'stop' && a.step < 20_000), `seed ${seed}`).toBe(true);
      expect(advice.at(-1)!.verdict).toBe('continue');
    }
  });
});
