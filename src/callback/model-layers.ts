/**
 * Finds what to measure in a compiled tf.LayersModel: its optimizer and, per layer, the trainable
 * variables whose gradients the optimizer receives under the same names.
 */
import type * as tf from '@tensorflow/tfjs';
import { TidemarkTypeError } from '../errors.js';
import type { LayerInfo } from '../protocol/records.js';

export interface TrackedVariable {
  /** The variable's name, as the optimizer sees it in applyGradients. */
  name: string;
  layer: string;
  /** Position in the flat list of all tracked variables. */
  index: number;
  shape: number[];
  size: number;
  variable: tf.Variable;
}

export interface TrackedLayer {
  name: string;
  className: string;
  params: number;
  variables: TrackedVariable[];
}

export interface ModelView {
  optimizer: tf.Optimizer;
  layers: TrackedLayer[];
  variables: TrackedVariable[];
  byName: Map<string, TrackedVariable>;
}

interface LayerLike {
  name: string;
  getClassName(): string;
  trainable: boolean;
  trainableWeights: { name: string; shape: (number | null)[]; read(): tf.Variable }[];
  layers?: LayerLike[];
}

function flattenLayers(layers: LayerLike[], out: LayerLike[]): LayerLike[] {
  for (const layer of layers) {
    // A model used as a layer: measure its inner layers, which own the variables.
    if (Array.isArray(layer.layers)) flattenLayers(layer.layers, out);
    else out.push(layer);
  }
  return out;
}

export function viewModel(model: unknown): ModelView {
  const m = model as { layers?: unknown; optimizer?: unknown; trainableWeights?: unknown } | null;
  if (m === null || typeof m !== 'object' || !Array.isArray(m.layers) || !Array.isArray(m.trainableWeights)) {
    throw new TidemarkTypeError(
      'TIDEMARK_ERR_MODEL_INVALID',
      'monitor(model, options) needs a tf.LayersModel (from tf.sequential() or tf.model()) as its first argument; ' +
        `received ${m === null ? 'null' : typeof m}.`,
    );
  }
  const optimizer = m.optimizer as tf.Optimizer | undefined;
  if (optimizer == null || typeof (optimizer as { applyGradients?: unknown }).applyGradients !== 'function') {
    throw new TidemarkTypeError(
      'TIDEMARK_ERR_MODEL_NOT_COMPILED',
      'The model has no optimizer. Call model.compile({ optimizer, loss }) before monitor(model).',
    );
  }
  const layers: TrackedLayer[] = [];
  const variables: TrackedVariable[] = [];
  const byName = new Map<string, TrackedVariable>();
  for (const layer of flattenLayers(m.layers as LayerLike[], [])) {
    if (!layer.trainable || layer.trainableWeights.length === 0) continue;
    const tracked: TrackedLayer = { name: layer.name, className: layer.getClassName(), params: 0, variables: [] };
    for (const w of layer.trainableWeights) {
      const variable = w.read();
      const shape = variable.shape.slice();
      const v: TrackedVariable = {
        name: variable.name,
        layer: layer.name,
        index: variables.length,
        shape,
        size: variable.size,
        variable,
      };
      tracked.variables.push(v);
      tracked.params += v.size;
      variables.push(v);
      byName.set(v.name, v);
    }
    layers.push(tracked);
  }
  if (variables.length === 0) {
    throw new TidemarkTypeError(
      'TIDEMARK_ERR_MODEL_NO_TRAINABLE',
      'The model has no trainable weights, so there are no gradients to measure. ' +
        'Unfreeze at least one layer (layer.trainable = true) and compile again.',
    );
  }
  return { optimizer, layers, variables, byName };
}

export function layerInfo(view: ModelView): LayerInfo[] {
  return view.layers.map((l) => ({
    name: l.name,
    class_name: l.className,
    params: l.params,
    variables: l.variables.map((v) => ({ name: v.name, shape: v.shape, params: v.size })),
  }));
}
