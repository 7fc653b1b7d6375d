import { describe, expect, it } from 'vitest';
import { detectPhases, type PhaseName, type PhaseSnapshot } from '../../src/analysis/phase-detector.js';
import { ADVICE_DEFAULTS, adviseStop, StopAdvisor, type Advice, type AdviceInput } from '../../src/analysis/stop-advice.js';
import { mulberry32 } from '../helpers/random.js';
import { NOISE_DB, snrSeries, spreadDrop, switchAt, constantSnr } from '../helpers/snr-series.js';

// The policy is issue 4's default: never advise stopping while the network drifts (or is undetermined);
// `may-stop` once diffusion has lasted at least as long as the drift and the watched quantity (val_loss when
// logged, else loss) has not improved by a relative 1e-3 over `patience` windows; `stop` after twice both.
// These thresholds are rules of thumb (common practice, no source).

const snap = (network: PhaseName, networkSince: number | null): PhaseSnapshot => ({ network, layers: {}, since: {}, networkSince });

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

describe('StopAdvisor (rules of thumb: common practice, no source)', () => {
  it('has the documented defaults: patience 10, relative improvement 1e-3, diffusion ratio 1', () => {
    expect(ADVICE_DEFAULTS).toEqual({ patience: 10, minRelativeImprovement: 1e-3, diffusionRatio: 1 });
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

  it('may-stop once diffusion ≥ the drift and no 1e-3 relative improvement over 10 windows; stop at twice both', () => {
    // Drift 1 → 1000 (999 steps). Loss improves 5 % a window until step 1000, then is flat.
    const { inputs, states } = script(60, (i) => ({ loss: 0.95 ** Math.min(i, 9) }));
    const advice = adviseStop(inputs, states);
    // The loss last improved at step 1000 (i = 9); 10 stale windows by step 2000. Diffusion reaches 999 steps
    // at step 1999, so may-stop first at step 2000.
    expect(firstStep(advice, 'may-stop')).toBe(2000);
    // stop: diffusion ≥ 2·999 (step 2998) and 20 stale windows (step 3000).
    expect(firstStep(advice, 'stop')).toBe(3000);
    const at = (step: number): Advice => advice.find((a) => a.step === step)!;
    expect(at(1900).verdict).toBe('continue');
    expect(at(2900).verdict).toBe('may-stop');
    expect(at(2000).stale_windows).toBe(10);
    expect(at(2000).watched).toBe('loss');
    expect(at(2000).best).toBeCloseTo(0.95 ** 9, 12);
    for (const v of ['may-stop', 'stop'] as const) expect(advice.find((a) => a.verdict === v)!.reason).toMatch(/Confirm on held-out data/);
    // Once there it stays: the loss never improves again.
    expect(advice.filter((a) => a.step >= 3000).every((a) => a.verdict === 'stop')).toBe(true);
  });

  it('waits for the diffusion to last as long as the drift even when the loss is flat long before', () => {
    const { inputs, states } = script(60, () => ({ loss: 1 }));
    const advice = adviseStop(inputs, states);
    // Stale from the start; the time condition alone decides: 999 steps after step 1000.
    expect(firstStep(advice, 'may-stop')).toBe(2000);
    expect(advice.find((a) => a.step === 1500)!.reason).toMatch(/In diffusion for 500 of the 999 steps/);
  });

  it('counts an improvement of 1e-3 relative, not less: a slow creep is stale, a real gain is not', () => {
    // Creep: −3e-5 relative a window never beats the best by 1e-3 within 20 windows → stop comes.
    const creepScript = script(80, (i) => ({ loss: 1 - 3e-5 * i }));
    const creep = adviseStop(creepScript.inputs, creepScript.states);
    expect(firstStep(creep, 'stop')).not.toBeNull();
    // Gain: −2e-3 relative a window beats it every window → never may-stop.
    const gainScript = script(80, (i) => ({ loss: 0.998 ** i }));
    const gain = adviseStop(gainScript.inputs, gainScript.states);
    expect(gain.every((a) => a.verdict === 'continue')).toBe(true);
    expect(gain.at(-1)!.reason).toMatch(/improved within the last 10 windows/);
  });

  it('watches val_loss over loss when it is logged, even when it arrives only every few windows', () => {
    // loss keeps falling (it would say continue), val_loss is flat: the advice follows val_loss.
    const onlyEvery3 = script(80, (i): Record<string, number> => (i % 3 === 2 ? { loss: 0.99 ** i, val_loss: 0.7 } : { loss: 0.99 ** i }));
    const advice = adviseStop(onlyEvery3.inputs, onlyEvery3.states);
    expect(advice.slice(2).every((a) => a.watched === 'val_loss')).toBe(true);
    expect(advice[0]!.watched).toBe('loss');
    // Windows without val_loss neither improve nor age it: 10 stale val_loss readings need 30 windows.
    const may = advice.find((a) => a.verdict === 'may-stop')!;
    expect(may.stale_windows).toBe(10);
    expect(may.step).toBe(3300);
    // The opposite: val_loss improving, loss flat → continue.
    const improving = script(80, (i) => ({ loss: 0.5, val_loss: 0.99 ** i }));
    expect(adviseStop(improving.inputs, improving.states).every((a) => a.verdict === 'continue')).toBe(true);
  });

  it('honours the watch, patience, minRelativeImprovement and diffusionRatio options', () => {
    const s = script(80, () => ({ loss: 1, val_loss: 1, acc_loss: 1 }));
    expect(adviseStop(s.inputs, s.states, { watch: 'acc_loss' })[0]!.watched).toBe('acc_loss');
    expect(firstStep(adviseStop(s.inputs, s.states, { diffusionRatio: 2 }), 'may-stop')).toBe(3000);
    const slow = script(80, (i) => ({ loss: 1 - 3e-5 * i }));
    expect(firstStep(adviseStop(slow.inputs, slow.states, { minRelativeImprovement: 1e-5 }), 'may-stop')).toBeNull();
    const flatEarly = script(80, (i) => ({ loss: i < 25 ? 1 / (i + 1) : 1 / 25 }));
    // Last improvement at step 2500: patience 5 → may-stop at 3000, patience 10 → 3500.
    expect(firstStep(adviseStop(flatEarly.inputs, flatEarly.states, { patience: 5 }), 'may-stop')).toBe(3000);
    expect(firstStep(adviseStop(flatEarly.inputs, flatEarly.states), 'may-stop')).toBe(3500);
  });

  it('a new drift resets: continue again, the drift is measured from its new start, and the old best is dropped', () => {
    const a = new StopAdvisor();
    const out: Advice[] = [];
    for (let i = 0; i < 120; i++) {
      const step = 100 * (i + 1);
      // Task 1: drift 1..1000, diffusion from 1000; task 2 from step 5000: drift until 7000, then diffusion.
      const phase =
        step < 300 ? snap('undetermined', null) : step < 1300 ? snap('drift', 1) : step < 5300 ? snap('diffusion', 1000) : step < 7300 ? snap('drift', 5000) : snap('diffusion', 7000);
      // The new task's loss is higher than the old best and flat from step 7000.
      const loss = step <= 1000 ? 1 / step : step < 5000 ? 1e-3 : step <= 7000 ? 2 - step / 1e4 : 1.3;
      out.push(a.update({ step, logs: { loss } }, phase));
    }
    const at = (step: number): Advice => out.find((x) => x.step === step)!;
    expect(at(4900).verdict).toBe('stop');
    for (let step = 5300; step < 7300; step += 100) expect(at(step).verdict).toBe('continue');
    // New drift 5000 → 7000 (2000 steps): may-stop needs diffusion until 9000, stop until 11 000.
    expect(firstStep(out.filter((x) => x.step > 7000), 'may-stop')).toBe(9000);
    expect(firstStep(out.filter((x) => x.step > 7000), 'stop')).toBe(11_000);
    // The best is the new task's, not the old 1e-3.
    expect(at(9000).best).toBeCloseTo(1.3, 12);
  });

  it('restart() starts the patience over: a stop becomes continue until the loss is stale again', () => {
    const a = new StopAdvisor({ patience: 2 });
    const diffusing = snap('diffusion', 100);
    let last: Advice | null = null;
    for (let i = 0; i < 40; i++) last = a.update({ step: 110 + 10 * i, logs: { loss: 1 } }, diffusing);
    expect(last!.verdict).toBe('stop');
    a.restart();
    expect(a.update({ step: 600, logs: { loss: 1 } }, diffusing).verdict).toBe('continue');
    const later = [1, 2, 3, 4].map((i) => a.update({ step: 600 + 10 * i, logs: { loss: 1 } }, diffusing).verdict);
    expect(later).toEqual(['continue', 'may-stop', 'may-stop', 'stop']);
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
