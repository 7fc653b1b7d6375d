/** Shared tfjs set-up for tests: the cpu and wasm backends, small seeded models and data. */
import { createRequire } from 'node:module';
import { dirname, join } from 'node:path';
import * as tf from '@tensorflow/tfjs';
import { gaussian, mulberry32 } from './random.js';

export { tf };

export async function useCpu(): Promise<void> {
  await tf.setBackend('cpu');
  await tf.ready();
}

/**
 * The wasm backend, its binaries read from the installed package (no download). Resolves to whether it started.
 * Imported here, not at the top: importing the package registers wasm as the preferred backend, which would make
 * every test file that shares these helpers start on an uninitialised wasm.
 */
export async function useWasm(): Promise<boolean> {
  const { setWasmPaths } = await import('@tensorflow/tfjs-backend-wasm');
  const require = createRequire(import.meta.url);
  setWasmPaths(join(dirname(require.resolve('@tensorflow/tfjs-backend-wasm')), '/'));
  const ok = await tf.setBackend('wasm');
  await tf.ready();
  return ok;
}

/** A seeded dense tanh network; equal seeds give equal initial weights. */
export function denseModel(options: {
  inputs: number;
  hidden: number[];
  outputs: number;
  seed?: number;
  lr?: number;
  loss?: string;
  outputActivation?: 'softmax' | 'linear';
  optimizer?: tf.Optimizer;
}): tf.Sequential {
  const seed = options.seed ?? 1;
  const model = tf.sequential();
  let inputs = options.inputs;
  options.hidden.forEach((units, i) => {
    model.add(
      tf.layers.dense({
        units,
        inputShape: [inputs],
        activation: 'tanh',
        kernelInitializer: tf.initializers.glorotUniform({ seed: seed + i }),
      }),
    );
    inputs = units;
  });
  model.add(
    tf.layers.dense({
      units: options.outputs,
      inputShape: [inputs],
      activation: options.outputActivation ?? 'softmax',
      kernelInitializer: tf.initializers.glorotUniform({ seed: seed + 100 }),
    }),
  );
  model.compile({
    optimizer: options.optimizer ?? tf.train.sgd(options.lr ?? 0.05),
    loss: options.loss ?? 'categoricalCrossentropy',
  });
  return model;
}

/** Seeded classification data: class means apart by `separation`, one-hot labels. */
export function blobs(n: number, inputs: number, classes: number, seed = 7, separation = 1.5) {
  const rng = mulberry32(seed);
  const centers = Array.from({ length: classes }, () => Array.from({ length: inputs }, () => gaussian(rng) * separation));
  const x: number[][] = [];
  const labels: number[] = [];
  for (let i = 0; i < n; i++) {
    const c = i % classes;
    labels.push(c);
    x.push(centers[c]!.map((m) => m + gaussian(rng)));
  }
  return { x, labels };
}

export function blobTensors(n: number, inputs: number, classes: number, seed = 7) {
  const { x, labels } = blobs(n, inputs, classes, seed);
  return { xs: tf.tensor2d(x), ys: tf.oneHot(tf.tensor1d(labels, 'int32'), classes).toFloat() };
}

export async function weightsOf(model: tf.LayersModel): Promise<Float32Array[]> {
  return Promise.all(model.getWeights().map(async (w) => (await w.data()) as Float32Array));
}
