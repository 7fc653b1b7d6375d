/**
 * Offline re-analysis of a stored run: the online detector and advisor run again over the stored
 * windows with other settings, and the result is compared with the markers recorded live.
 */
import { TidemarkRangeError } from '../errors.js';
import { closestName } from '../option-check.js';
import { detectPhases, type PhaseChange, type PhaseOptions } from '../analysis/phase-detector.js';
import { adviceChanges, adviseStop, type Advice, type AdviceOptions } from '../analysis/stop-advice.js';
import type { Marker } from '../protocol/records.js';
import { toAsyncStore, type AnyStore } from '../storage/async-store.js';

export interface AnalyzeResult {
  runId: string;
  windows: number;
  changes: PhaseChange[];
  /** Markers recorded online (phase kinds only). */
  online: Marker[];
  /** Offline changes with no online marker of the same layer and kind… */
  added: PhaseChange[];
  /** …and online markers with no offline counterpart. */
  missing: Marker[];
  /** Pairs found both ways, with the step difference (offline − online). */
  matched: { offline: PhaseChange; online: Marker; stepShift: number }[];
  advice: Advice | null;
  adviceChanges: Advice[];
}

const PHASE_KINDS = new Set(['drift-start', 'diffusion-start']);

/** Pairs each offline change with the nearest unpaired online marker of the same layer and kind. */
export function compareMarkers(offline: PhaseChange[], online: Marker[]): Pick<AnalyzeResult, 'added' | 'missing' | 'matched'> {
  const key = (layer: string | null, kind: string) => `${layer ?? ''}\u0000${kind}`;
  const pool = new Map<string, Marker[]>();
  for (const m of online) {
    const k = key(m.layer, m.kind);
    const list = pool.get(k) ?? [];
    list.push(m);
    pool.set(k, list);
  }
  const added: PhaseChange[] = [];
  const matched: AnalyzeResult['matched'] = [];
  for (const c of offline) {
    const list = pool.get(key(c.layer, c.kind));
    if (list === undefined || list.length === 0) {
      added.push(c);
      continue;
    }
    // The nearest online marker of the same layer and kind.
    let best = 0;
    for (let i = 1; i < list.length; i++) if (Math.abs(list[i]!.step - c.step) < Math.abs(list[best]!.step - c.step)) best = i;
    const m = list.splice(best, 1)[0]!;
    matched.push({ offline: c, online: m, stepShift: c.step - m.step });
  }
  const missing = [...pool.values()].flat();
  return { added, missing, matched };
}

export async function analyzeRun(anyStore: AnyStore, runId: string, phases: PhaseOptions, advice: AdviceOptions): Promise<AnalyzeResult> {
  const store = toAsyncStore(anyStore);
  const windows = await store.windows(runId);
  if (advice.watch !== undefined && windows.length > 0 && !windows.some((w) => advice.watch! in w.logs)) {
    const names = [...new Set(windows.flatMap((w) => Object.keys(w.logs)))].sort();
    const best = closestName(advice.watch, names);
    throw new TidemarkRangeError(
      'TIDEMARK_ERR_OPTION_INVALID',
      `--watch '${advice.watch}' is not in this run's logs${best !== null ? ` (did you mean '${best}'?)` : ''}; logged: ${names.length > 0 ? names.join(', ') : 'nothing'}.`,
    );
  }
  const { states, changes } = detectPhases(windows, phases);
  const advices = adviseStop(windows, states, advice);
  const online = (await store.markers(runId)).filter((m) => PHASE_KINDS.has(m.kind) && m.details.source !== 'offline');
  const changedAdvice = adviceChanges(advices);
  return {
    runId,
    windows: windows.length,
    changes,
    online,
    ...compareMarkers(changes, online),
    advice: advices.at(-1) ?? null,
    adviceChanges: changedAdvice,
  };
}

/** The offline result as markers to store next to the online ones. */
export function offlineMarkers(result: AnalyzeResult, settings: Record<string, unknown>): Marker[] {
  const phaseMarkers: Marker[] = result.changes.map((c) => ({
    run: result.runId,
    ...c,
    details: { ...c.details, source: 'offline', settings },
  }));
  const adviceMarkers: Marker[] = result.adviceChanges.map((a) => ({
    run: result.runId,
    layer: null,
    kind: 'advice',
    step: a.step,
    detected_step: a.step,
    confidence: 1,
    details: { verdict: a.verdict, stage: a.stage, reason: a.reason, source: 'offline', settings },
  }));
  return [...phaseMarkers, ...adviceMarkers];
}
