import { describe, expect, it } from 'vitest';
import { amplitudeDb, powerDb } from '../../src/analysis/decibel.js';

// Source (methods.md §2): IUPAC Green Book, 2nd ed., p. 79 — field (amplitude) level
// L_F = 20·log10(F/F0) dB; power level L_P = 10·log10(P/P0) dB; ISO 80000-1:2009 Annex C and
// IEC 60027-3:2002 as cited there. Table values are methods.md §2 [computed], printed to 6 decimals,
// so they are compared to within 5e-7.

const TABLE: ReadonlyArray<{ r: number; amplitude: number; power: number; label: string }> = [
  { label: '10', r: 10, amplitude: 20.0, power: 10.0 },
  { label: '2', r: 2, amplitude: 6.0206, power: 3.0103 },
  { label: '√2', r: Math.SQRT2, amplitude: 3.0103, power: 1.50515 },
  { label: '1', r: 1, amplitude: 0, power: 0 },
  { label: '0.5', r: 0.5, amplitude: -6.0206, power: -3.0103 },
  { label: '100', r: 100, amplitude: 40, power: 20 },
];

describe('amplitudeDb and powerDb', () => {
  for (const row of TABLE) {
    it(`give ${row.amplitude} dB (amplitude) and ${row.power} dB (power) for ratio ${row.label}`, () => {
      // methods.md §2 table, the row for this ratio [computed].
      expect(amplitudeDb(row.r)).toBeCloseTo(row.amplitude, 6);
      expect(powerDb(row.r)).toBeCloseTo(row.power, 6);
    });
  }

  it('express the §1 row-3 SNR 2.2079402166 as 6.879746 dB', () => {
    // methods.md §2 table, "SNR row 3 of §1" [computed].
    expect(amplitudeDb(2.2079402166)).toBeCloseTo(6.879746, 6);
  });

  it('give 6.651117 dB both for the amplitude 2.1505813 and for the power SNR_corr² = 4.625', () => {
    // methods.md §2 table, last row [computed]: the two conventions agree when P = F².
    expect(amplitudeDb(Math.sqrt(4.625))).toBeCloseTo(6.651117, 6);
    expect(powerDb(4.625)).toBeCloseTo(6.651117, 6);
  });

  it('agree with each other whenever the power ratio is the square of the amplitude ratio', () => {
    // IUPAC Green Book p. 79 / ISO 80000-1 Annex C: L = 20·log10(F/F0) = 10·log10(F²/F0²).
    for (const r of [1e-6, 0.003, 0.7, 1.3, 42, 9.5e5]) {
      expect(amplitudeDb(r)).toBeCloseTo(powerDb(r * r), 9);
    }
  });

  it('map a zero ratio to -Infinity', () => {
    // methods.md §2 edge cases: r = 0 gives −Infinity (exposed as -Inf).
    expect(amplitudeDb(0)).toBe(-Infinity);
    expect(powerDb(0)).toBe(-Infinity);
  });

  it('map a negative ratio or NaN to NaN', () => {
    // methods.md §2 edge cases: r < 0 or NaN gives NaN.
    for (const r of [-1, -1e-300, -Infinity, Number.NaN]) {
      expect(amplitudeDb(r)).toBeNaN();
      expect(powerDb(r)).toBeNaN();
    }
  });
});
