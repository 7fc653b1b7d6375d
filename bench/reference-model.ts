/**
 * The reference model every bench measures against: dense 32→64→128→64→32→4, tanh hidden layers, a
 * softmax output, plain SGD, batch 32, 4096 seeded samples (one epoch = 128 steps).
 */
import * as tf from '@tensorflow/tfjs';

export const FEATURES = 32;
export const HIDDEN = [64, 128, 64, 32] as const;
export const CLASSES = 4;
export const SAMPLES = 4096;
export const BATCH = 32;
export const LR = 0.05;
export const DATA_SEED = 20_240_601;
export const MODEL_SEED = 7;

/** A freshly initialised, compiled reference model; equal seeds give equal weights. */
export function buildReferenceModel(seed = MODEL_SEED): tf.Sequential {
  const model = tf.sequential();
  HIDDEN.forEach((units, i) => {
    model.add(
      tf.layers.dense({
        units,
        activation: 'tanh',
        kernelInitializer: tf.initializers.glorotUniform({ seed: seed + i }),
        ...(i === 0 ? { inputShape: [FEATURES] } : {}),
      }),
    );
  });
  model.add(
    tf.layers.dense({
      units: CLASSES,
      activation: 'softmax',
      kernelInitializer: tf.initializers.glorotUniform({ seed: seed + HIDDEN.length }),
    }),
  );
  model.compile({ optimizer: tf.train.sgd(LR), loss: 'categoricalCrossentropy' });
  return model;
}
