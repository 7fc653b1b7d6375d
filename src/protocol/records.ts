/**
 * The records a run produces, shared by the callback, the sinks and (later) the server and page.
 * Field names are the stable snake_case metric names of design.md.
 */

/** Statistics of one trainable variable (a kernel or a bias) over one window. */
export interface VariableStats {
  /** ||m||₂, the norm of the mean minibatch gradient over the window. */
  grad_mean_norm: number;
  /** sqrt(Σ s²), the root of the summed unbiased elementwise gradient variance. */
  grad_std_norm: number;
  /** grad_mean_norm / grad_std_norm, an amplitude ratio. Reads near `snr_floor` on pure noise. */
  grad_snr: number;
  /** 20·log10(grad_snr). */
  grad_snr_db: number;
  /**
   * sqrt(Σ‖g_{k+1} − g_k‖² / (2·pairs)) over consecutive minibatch gradients of the window: the minibatch
   * noise sqrt(tr Σ/B), plus the gradient's change in one step, without the window's slow drift (the mean
   * square successive difference of von Neumann et al. 1941). The phase detector's noise yardstick. NaN when
   * the window had no consecutive pair.
   */
  grad_diff_norm?: number;
  /**
   * Simple gradient noise scale tr Σ/|G|² (McCandlish et al. 2018) at the weights of the window's end, from
   * a noise measurement (gradients of disjoint row groups at fixed weights; see the window's `noise`). Null
   * in windows without a measurement and where |G|² was not resolved from noise.
   */
  noise_scale: number | null;
  /** Jackknife standard error of ln(noise_scale), ≈ its relative error; present where a measurement ran. */
  noise_scale_rse?: number;
  /**
   * SNR of one training minibatch at fixed weights, |G|/sqrt(tr Σ/B) = sqrt(B/noise_scale), as
   * 10·log10(B/noise_scale) dB; present where noise_scale is. 0 dB where the batch equals the noise scale.
   */
  batch_snr_db?: number;
  /**
   * sqrt(tr Σ / B): the spread of one training minibatch's gradient around G at fixed weights, from the
   * same measurement (present where tr Σ was estimated). Compare with `grad_std_norm`, the spread over the
   * window at moving weights, which also holds the gradient's change along the path.
   */
  grad_noise_norm?: number;
  /** ||w|| at the window's end. */
  weight_norm: number;
  /** ||w − w₀||, the distance from the weights at monitor() time. */
  weight_travel: number;
  /** ||Δw|| / ||w|| of one optimizer step, sampled at the window's first minibatch. */
  update_ratio: number;
  /** Non-finite gradient values seen in the window (kept out of the statistics). */
  nonfinite: number;
  /** K: minibatch gradients that entered the statistics. */
  batches: number;
  /** Number of scalar parameters. */
  params: number;
}

/** Statistics of one layer (its variables pooled) or of the whole network (all layers pooled). */
export interface LayerStats extends VariableStats {
  /** Local log-log slope of weight_travel against step; null until enough windows. */
  travel_exponent: number | null;
  /** Per-variable values, keyed by the variable's name. Absent on the network entry. */
  variables?: Record<string, VariableStats>;
  // Probe values: present on a layer in the windows where the activation probe ran (probe.every), absent
  // otherwise. The run's config.probe records the estimators and their settings (bins, σ², rows).
  /** Mean of the layer's activations over the probe set (finite values). */
  act_mean?: number;
  /** Population standard deviation of those activations. */
  act_std?: number;
  /** Fraction of activations at a limit: within 1% of the range of tanh/sigmoid/softmax, exactly 0 for ReLU. Absent for unbounded activations. */
  act_saturation?: number;
  /** Binned I(X;T) = H(T), bits (plug-in, `bins` per unit). */
  mi_input?: number;
  /** Binned I(T;Y) = H(T) − H(T|Y), bits. */
  mi_label?: number;
  /** 1 when H(T) is within 0.1 bit of log2(probe rows): every example has its own cell and mi_input/mi_label say nothing. */
  mi_saturated?: number;
  /** KL-based upper bound on I(X;T+noise), bits (Kolchinsky & Tracey 2017). */
  mi_input_upper?: number;
  /** Bhattacharyya-based lower bound on I(X;T+noise), bits. */
  mi_input_lower?: number;
  /** Pairwise estimate of I(T+noise;Y), bits: an estimate, not a bound. */
  mi_label_pairwise?: number;
  /** 1 when the lower bound is within 0.1 bit of log2(rows used): the bounds say nothing. */
  mi_bounds_saturated?: number;
  /** σ² of the noise the pairwise values assume in this window: probe.noiseRatio × the layer's total variance, or the absolute probe.noiseVariance. */
  mi_noise_variance?: number;
  /** Lower bound on I(T;Y) from a linear read-out of the layer, cross-fitted on the probe rows (Barber & Agakov 2003), bits. */
  mi_label_linear?: number;
  /** Held-out accuracy of that linear read-out. */
  linear_accuracy?: number;
  /** Probe rows that entered the binned estimate (rows with non-finite activations are left out). */
  probe_rows?: number;
}

/** The noise measurement taken at a window's end (between two steps, at fixed weights). */
export interface NoiseSample {
  /**
   * `measured`: the network's noise scale was resolved (layers that were not say so in `reason`);
   * `unresolved`: |G|² of the network was not resolved from noise within the measurement's groups;
   * `unavailable`: no training rows (or too few); `failed`: the gradients were not finite.
   */
  status: 'measured' | 'unresolved' | 'unavailable' | 'failed';
  /** Why values are missing, in a sentence; null when every layer was resolved. */
  reason: string | null;
  /** K, groups of rows whose gradients were taken. */
  groups: number;
  /** Rows per group. */
  group_rows: number;
  /** K × group_rows, rows used (drawn without replacement). */
  rows: number;
  /** Rows of the training set drawn from (the finite-population correction uses it); null for a sample of unknown size. */
  population: number | null;
  /** Wall time of the measurement, ms. */
  ms: number;
  /**
   * A lower bound on the network's noise scale (examples), tr Σ / (|G|² + 2·SE): what an unresolved
   * measurement still says (the mean gradient is lost in the noise, so the noise scale is at least this).
   * Null or absent when unknown (records written before it existed).
   */
  noise_scale_low?: number | null;
}

/** One window of minibatches. */
export interface WindowRecord {
  /** Run id (UUID). */
  run: string;
  /** Sequence number of the window in the run, from 0. */
  index: number;
  /** Minibatches since the run began, counted at the window's last minibatch. */
  step: number;
  /** First step of the window. */
  first_step: number;
  /** Epoch (from 0) in which the window ended, or null outside fit. */
  epoch: number | null;
  /** K, minibatches in the window. */
  batches: number;
  /** Mean examples per minibatch, B; null when unknown. */
  batch_size: number | null;
  /** M, minibatches per epoch, once an epoch has been seen; null before or outside fit. */
  batches_per_epoch: number | null;
  /** Minibatches of the window in each epoch it touched, in order (e.g. [40, 8]); empty outside fit. */
  pass_batches: number[];
  /**
   * The SNR that pure noise reads at for this window: sqrt(f/K) with f = Σ_p k_p(1 − k_p/M)/K over the
   * epochs it touched (sqrt((1 − K/M)/K) within one epoch), or 1/sqrt(K) when M is unknown.
   */
  snr_floor: number;
  /** Wall-clock time the window closed, ms since the epoch. */
  time: number;
  layers: Record<string, LayerStats>;
  network: LayerStats;
  /** The noise measurement at the window's end; absent when none was due. */
  noise?: NoiseSample;
  /** Means over the window of the numbers fit logged per batch, and val_* of an epoch that ended in it. */
  logs: Record<string, number>;
}

export type Phase = 'drift' | 'diffusion' | 'undetermined';

export type MarkerKind =
  | 'drift-start'
  | 'diffusion-start'
  | 'compression-start'
  | 'nonfinite'
  | 'advice'
  | 'stopped'
  | 'note';

export interface Marker {
  run: string;
  /** Layer name, or null for the whole network. */
  layer: string | null;
  kind: MarkerKind;
  /** Estimated step where the change happened. */
  step: number;
  /** Step at which it was known. */
  detected_step: number;
  /** In [0, 1]. */
  confidence: number;
  details: Record<string, unknown>;
}

/** What makes a marker the same marker within a run (the store's unique key): its layer, kind, step and detected step. */
export function markerKey(m: Marker): string {
  return `${m.layer ?? ''}\u0000${m.kind}\u0000${m.step}\u0000${m.detected_step}`;
}

export interface LayerInfo {
  name: string;
  class_name: string;
  params: number;
  variables: { name: string; shape: number[]; params: number }[];
}

export interface RunInfo {
  id: string;
  name: string;
  group: string | null;
  tags: Record<string, string>;
  started_at: number;
  config: Record<string, unknown>;
  layers: LayerInfo[];
}

export type RunStatus = 'running' | 'finished' | 'failed' | 'interrupted';

/** Everything a sink is given, one JSON object per record in a JSON Lines file. */
export type SinkRecord =
  | { type: 'run'; run: RunInfo }
  | { type: 'window'; window: WindowRecord }
  | { type: 'marker'; marker: Marker }
  | { type: 'warning'; run: string; code: string; message: string; step: number | null; time: number }
  | { type: 'end'; run: string; status: RunStatus; step: number; time: number };

/** A window without its layers' per-variable statistics. */
export function withoutVariables(window: WindowRecord): WindowRecord {
  const layers: WindowRecord['layers'] = {};
  for (const [name, stats] of Object.entries(window.layers)) {
    const { variables: _variables, ...rest } = stats;
    layers[name] = rest;
  }
  return { ...window, layers };
}
