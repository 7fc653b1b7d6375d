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
