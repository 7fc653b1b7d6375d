import { describe, expect, it } from 'vitest';
import { parse } from 'csv-parse/sync';
import { csvField, csvLine, type CsvValue } from '../../src/storage/csv.js';
import { mulberry32 } from '../helpers/random.js';

// Sources:
//  - RFC 4180 (Y. Shafranovich 2005), "Common Format and MIME Type for Comma-Separated Values (CSV)
//    Files", §2: rule 1 CRLF ends a record; rule 4 fields are separated by commas; rule 5 a field may
//    be enclosed in double quotes; rule 6 fields holding CRLF, double quotes or commas must be; rule 7
//    a double quote inside a quoted field is written as two.
//  - Reference reader: csv-parse 7.0.3 (npm), `csv-parse/sync`, default options.
//  - ECMA-262, Number::toString: String(x) gives the fewest significant digits that read back to x
//    (from memory); checked here by reading every written number back with Number().

/** Parses a document with csv-parse and returns its records as string arrays. */
function readBack(text: string): string[][] {
  return parse(text, { relax_column_count: true }) as string[][];
}

/** What each value should read back as from a plain parser. */
function expectedString(value: CsvValue): string {
  if (value === null) return '';
  if (typeof value === 'number') return Object.is(value, -0) ? '-0' : String(value);
  return value;
}

/** A double from 64 random bits: covers subnormals, huge exponents, ±0, infinities and NaNs. */
function randomDouble(rng: () => number): number {
  const view = new DataView(new ArrayBuffer(8));
  view.setUint32(0, Math.floor(rng() * 2 ** 32));
  view.setUint32(4, Math.floor(rng() * 2 ** 32));
  return view.getFloat64(0);
}

describe('csvLine', () => {
  it('separates fields with commas and ends the record with CRLF (RFC 4180 §2 rules 1, 4)', () => {
    expect(csvLine(['run', 3, 0.5, null])).toBe('run,3,0.5,\r\n');
    expect(readBack(csvLine(['run', 3, 0.5, null]))).toEqual([['run', '3', '0.5', '']]);
  });

  it('quotes fields with a comma, double quote, CR or LF and doubles quotes (RFC 4180 §2 rules 5–7)', () => {
    expect(csvLine(['a,b', 'say "hi"', 'x\r\ny', 'cr\r', 'lf\n'])).toBe(
      '"a,b","say ""hi""","x\r\ny","cr\r","lf\n"\r\n',
    );
    expect(readBack(csvLine(['a,b', 'say "hi"', 'x\r\ny', 'cr\r', 'lf\n']))).toEqual([
      ['a,b', 'say "hi"', 'x\r\ny', 'cr\r', 'lf\n'],
    ]);
  });

  it('quotes a leading or trailing space so trimming readers keep it', () => {
    expect(csvLine([' lead', 'trail ', 'mid dle'])).toBe('" lead","trail ",mid dle\r\n');
    expect(readBack(csvLine([' lead', 'trail ', 'mid dle']))).toEqual([[' lead', 'trail ', 'mid dle']]);
  });

  it('writes null as an empty field and the empty string as "" so the two stay distinguishable', () => {
    expect(csvLine([null, '', null])).toBe(',"",\r\n');
    // csv-parse reports quoting per field through `cast`.
    const quoted = parse(csvLine([null, '', null]), {
      cast: (_value: string, context: { quoting: boolean }) => context.quoting,
    }) as unknown as boolean[][];
    expect(quoted).toEqual([[false, true, false]]);
    expect(readBack(csvLine([null]))).toEqual([['']]);
  });

  it('reads back unicode, quote-heavy and 10 kB fields exactly, over many records', () => {
    const rng = mulberry32(4180);
    const alphabet = ['a', 'Z', '0', ' ', ',', '"', '""', '\r', '\n', '\r\n', 'é', 'ß', '漢', '🌊', '\u0000', '\t', ';'];
    const records: CsvValue[][] = [];
    for (let r = 0; r < 200; r++) {
      const record: CsvValue[] = [];
      const fields = 1 + Math.floor(rng() * 6);
      for (let f = 0; f < fields; f++) {
        const length = Math.floor(rng() * 12);
        let s = '';
        for (let k = 0; k < length; k++) s += alphabet[Math.floor(rng() * alphabet.length)]!;
        record.push(s);
      }
      records.push(record);
    }
    let big = '';
    while (big.length < 10_240) big += 'ten "kB", line\r\n🌊 ';
    records.push([big, 'after', big.replaceAll('"', '')]);
    records.push(['x'.repeat(10_240)]);

    const text = records.map((rec) => csvLine(rec)).join('');
    expect(readBack(text)).toEqual(records.map((rec) => rec.map(expectedString)));
  });

  it('throws a coded TypeError for an empty record', () => {
    expect(() => csvLine([])).toThrow(
      expect.objectContaining({
        name: 'TidemarkTypeError',
        code: 'TIDEMARK_ERR_OPTION_INVALID',
        message: 'csvLine: received an empty array; a CSV record needs at least one field.',
      }),
    );
  });
});

describe('csvField numbers', () => {
  it('writes the named values and reads them back with Number() to the identical double', () => {
    const cases: ReadonlyArray<[number, string]> = [
      [0.1 + 0.2, '0.30000000000000004'],
      [1e-300, '1e-300'],
      [5e-324, '5e-324'], // smallest subnormal
      [2.225073858507201e-308, '2.225073858507201e-308'], // largest subnormal
      [Number.MAX_VALUE, '1.7976931348623157e+308'],
      [Number.MAX_SAFE_INTEGER, '9007199254740991'],
      [2 ** 53 + 2, '9007199254740994'],
      [1e21, '1e+21'],
      [123456789012345680000, '123456789012345680000'],
      [-1.5, '-1.5'],
      [0, '0'],
      [-0, '-0'],
      [Number.NaN, 'NaN'],
      [Number.POSITIVE_INFINITY, 'Infinity'],
      [Number.NEGATIVE_INFINITY, '-Infinity'],
    ];
    for (const [value, text] of cases) {
      expect(csvField(value)).toBe(text);
      const [[field]] = readBack(csvLine([value])) as [[string]];
      expect(Object.is(Number(field), value), `${text} reads back`).toBe(true);
    }
  });

  it('round-trips 20,000 random 64-bit patterns, 4,000 subnormals and 2,000 integers through csv-parse and Number()', () => {
    const rng = mulberry32(2005);
    const values: number[] = [];
    for (let i = 0; i < 20_000; i++) values.push(randomDouble(rng));
    // Also subnormals and small integers specifically, which random bits rarely hit.
    // k·2^-1074 with 0 < k < 2^52 is exactly the k-th positive subnormal.
    for (let i = 0; i < 2_000; i++) {
      const subnormal = (1 + Math.floor(rng() * (2 ** 52 - 1))) * 2 ** -1074;
      values.push(subnormal, -subnormal, Math.floor(rng() * 1e6) - 5e5);
    }
    expect(values.filter((v) => v !== 0 && Math.abs(v) < 2.2250738585072014e-308).length).toBeGreaterThan(3_999);
    expect(values.some((v) => Number.isNaN(v))).toBe(true);

    const rows: number[][] = [];
    for (let i = 0; i < values.length; i += 8) rows.push(values.slice(i, i + 8));
    const back = readBack(rows.map((row) => csvLine(row)).join(''));
    expect(back).toHaveLength(rows.length);
    rows.forEach((row, r) => {
      row.forEach((value, f) => {
        const field = back[r]![f]!;
        // NaN payloads are not kept: every NaN is written as the word NaN.
        if (!Object.is(Number(field), value)) expect.fail(`${field} did not read back to ${String(value)}`);
      });
    });
  });

  it('writes the shortest round-trip form, not a fixed 17 digits', () => {
    expect(csvField(0.1)).toBe('0.1');
    expect(csvField(1 / 3)).toBe('0.3333333333333333');
  });
});

describe('csvField strings and bad values', () => {
  it('leaves plain strings and number-like strings unquoted', () => {
    expect(csvField('dense_1/kernel')).toBe('dense_1/kernel');
    expect(csvField('1e5')).toBe('1e5');
  });

  it('throws a coded TypeError for values that are not string, number or null', () => {
    const bad: Array<[unknown, string]> = [
      [undefined, 'undefined'],
      [true, 'a boolean'],
      [10n, 'the bigint 10n'],
      [{}, 'an object'],
    ];
    for (const [value, described] of bad) {
      expect(() => csvField(value as CsvValue)).toThrow(
        expect.objectContaining({
          name: 'TidemarkTypeError',
          code: 'TIDEMARK_ERR_OPTION_INVALID',
          message: `csvField: expected a string, number or null, received ${described}; convert it first.`,
        }),
      );
    }
  });
});
