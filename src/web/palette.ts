/**
 * Series colours: the eight-colour palette of Okabe & Ito (2008), "Color Universal Design (CUD): how to
 * make figures and presentations that are friendly to colorblind people", chosen to stay distinguishable
 * under the common forms of colour-vision deficiency. Yellow is left to last (it is faint on white), and
 * lines past the seventh also change their dash pattern, so colour is never the only cue.
 */
export const OKABE_ITO = {
  black: '#000000',
  orange: '#E69F00',
  skyBlue: '#56B4E9',
  bluishGreen: '#009E73',
  yellow: '#F0E442',
  blue: '#0072B2',
  vermillion: '#D55E00',
  reddishPurple: '#CC79A7',
} as const;

const LAYER_ORDER = [
  OKABE_ITO.blue,
  OKABE_ITO.orange,
  OKABE_ITO.bluishGreen,
  OKABE_ITO.vermillion,
  OKABE_ITO.reddishPurple,
  OKABE_ITO.skyBlue,
  OKABE_ITO.yellow,
];

const DASHES: number[][] = [[], [8, 4], [2, 3], [8, 3, 2, 3]];

/** Colour and dash pattern of the i-th layer's line. */
export function layerStyle(i: number): { stroke: string; dash: number[] } {
  const n = LAYER_ORDER.length;
  return { stroke: LAYER_ORDER[i % n]!, dash: DASHES[Math.floor(i / n) % DASHES.length]! };
}

/** The whole network: black, drawn thicker. */
export const NETWORK_STYLE = { stroke: OKABE_ITO.black, width: 2.5 };
/** The noise floor and the 0 dB reference: grey, dashed. */
export const REFERENCE_GREY = '#777777';

/**
 * Fill of each phase: greys, so that no phase shares a colour with a layer, a run or a metric line (drift
 * was orange, the second layer's and the second run's colour). Diffusion is also hatched, so the phases
 * differ without relying on shade alone.
 */
export const PHASE_FILL: Record<'drift' | 'diffusion' | 'undetermined', string> = {
  drift: '#4d4d4d',
  diffusion: '#b0b0b0',
  undetermined: '#ececec',
};

/** val_loss beside loss: the loss's black, dashed, with hollow points (vermillion was the fourth layer's colour). */
export const VAL_LOSS_STYLE = { stroke: OKABE_ITO.black, dash: [6, 3], width: 1.5, pointFill: '#ffffff' };

/** Every colour a line can take: layers and runs (LAYER_ORDER), the network and the reference grey. */
export const LINE_COLOURS: readonly string[] = [...LAYER_ORDER, NETWORK_STYLE.stroke, REFERENCE_GREY];
