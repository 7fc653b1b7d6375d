/**
 * Decibel levels. An amplitude (root-power) ratio such as ||mean|| / ||std|| takes 20·log10; a
 * power ratio takes 10·log10, so both give the same level when P ∝ F² (ISO 80000-1 Annex C).
 */

/** 20·log10(ratio). 0 gives -Infinity; a negative ratio or NaN gives NaN. */
export function amplitudeDb(ratio: number): number {
  if (Number.isNaN(ratio) || ratio < 0) return Number.NaN;
  return 20 * Math.log10(ratio);
}

/** 10·log10(ratio). 0 gives -Infinity; a negative ratio or NaN gives NaN. */
export function powerDb(ratio: number): number {
  if (Number.isNaN(ratio) || ratio < 0) return Number.NaN;
  return 10 * Math.log10(ratio);
}
