import { describe, expect, it } from 'vitest';
import {
  OPENMETRICS_CONTENT_TYPE,
  OpenMetricsError,
  PROMETHEUS_TEXT_CONTENT_TYPE,
  escapeHelp,
  escapeLabelValue,
  formatValue,
  isValidLabelName,
  isValidMetricName,
  renderOpenMetrics,
  renderPrometheusText,
  sanitizeName,
  type Family,
} from '../../src/server/openmetrics.js';
import { mulberry32 } from '../helpers/random.js';

// Sources:
//  - OpenMetrics 1.0 specification, OpenObservability/OpenMetrics `specification/OpenMetrics.md`
//    (cited below as "OM spec", with the section name), in particular its ABNF, "Overall
//    Structure", "Escaping", "Numbers", "MetricFamily metadata" and the per-type examples.
//  - methods.md §8.1 (rules, numbered 1–11) and §8.2 (test vectors), which restate the OM spec and
//    the Prometheus exposition-format docs (`docs/instrumenting/exposition_formats.md`, text 0.0.4).

/** OM spec ABNF `number` (realnumber, or case-insensitive [sign] inf/infinity, or nan). */
const ABNF_NUMBER =
  /^(?:[+-]?\d+|[+-]?\d+(?:\.\d*)?(?:[eE][+-]?\d+)?|[+-]?\d*\.\d+(?:[eE][+-]?\d+)?|[+-]?(?:inf|infinity)|nan)$/i;
/** OM spec ABNF `escaped-string` (normal-char, or BS followed by n, DQUOTE or BS). */
const ABNF_ESCAPED_STRING = /^(?:[^\\"\n]|\\[n"\\])*$/u;

/** Decodes an OM escaped-string (OM spec "Escaping"), written here from the spec, not from the writer. */
function unescapeOM(s: string): string {
  return s.replace(/\\(.)/g, (_, c: string) => (c === 'n' ? '\n' : c));
}

function lines(text: string): string[] {
  expect(text.endsWith('\n')).toBe(true);
  return text.slice(0, -1).split('\n');
}

const family = (f: Partial<Family> & { name: string }): Family => ({ type: 'gauge', samples: [], ...f });

describe('content types', () => {
  it('is the OpenMetrics 1.0 content type', () => {
    // OM spec "Overall Structure": "The content type MUST be: application/openmetrics-text;
    // version=1.0.0; charset=utf-8"; methods.md §8.1 rule 1.
    expect(OPENMETRICS_CONTENT_TYPE).toBe('application/openmetrics-text; version=1.0.0; charset=utf-8');
  });

  it('has a Prometheus 0.0.4 content type for the fallback rendering', () => {
    // Prometheus exposition_formats.md: `text/plain; version=0.0.4`; methods.md §8.1 (charset
    // parameter: from memory, "client libraries usually add").
    expect(PROMETHEUS_TEXT_CONTENT_TYPE).toBe('text/plain; version=0.0.4; charset=utf-8');
  });
});

describe('formatValue', () => {
  it('writes integers without a decimal point', () => {
    // OM spec "Numbers": "Integer numbers MUST NOT have a decimal point" (examples 23, 1341298465647914).
    expect(formatValue(0)).toBe('0');
    expect(formatValue(23)).toBe('23');
    expect(formatValue(1500)).toBe('1500');
    expect(formatValue(-3)).toBe('-3');
    expect(formatValue(1341298465647914)).toBe('1341298465647914');
    expect(formatValue(2 ** 53)).toBe('9007199254740992');
    expect(formatValue(1e20)).toBe('100000000000000000000');
  });

  it('writes 1e21 as 1e+21, which fits the ABNF', () => {
    // methods.md §8.1 rule 8: "JS 1e+21 fits the ABNF"; OM spec ABNF realnumber.
    expect(formatValue(1e21)).toBe('1e+21');
    expect(formatValue(1e21)).toMatch(ABNF_NUMBER);
  });

  it('writes floats with a point or an exponent', () => {
    // OM spec "Numbers": floats "MUST be represented either with a decimal point or using scientific
    // notation. Examples are 8903.123421 and 1.89e-7".
    expect(formatValue(8903.123421)).toBe('8903.123421');
    expect(formatValue(1.89e-7)).toBe('1.89e-7');
    expect(formatValue(2.2079402165819615)).toBe('2.2079402165819615'); // methods.md §8.2 vector
    expect(formatValue(-1e-7)).toBe('-1e-7');
    expect(formatValue(5e-324)).toBe('5e-324');
    expect(formatValue(Number.MAX_VALUE)).toBe('1.7976931348623157e+308');
  });

  it('writes negative zero as 0', () => {
    // Our choice: the sign of zero means nothing for these metrics, and it keeps a counter from
    // ever printing a minus sign. "0" is an ABNF integer (OM spec ABNF realnumber).
    expect(formatValue(-0)).toBe('0');
  });

  it('writes NaN, +Inf and -Inf', () => {
    // OM spec "Values": NaN, +Inf and -Inf MUST be supported; "Canonical Numbers": "Exposers MUST
    // produce output for positive infinity as +Inf"; methods.md §8.1 rule 8.
    expect(formatValue(NaN)).toBe('NaN');
    expect(formatValue(Infinity)).toBe('+Inf');
    expect(formatValue(-Infinity)).toBe('-Inf');
  });

  it('gives ABNF numbers that read back to the same double, for many random doubles', () => {
    // OM spec ABNF `number`; round trip: OM spec "Numbers" (floats MUST fit IEEE 754 float64).
    const rng = mulberry32(8);
    const buf = new DataView(new ArrayBuffer(8));
    for (let i = 0; i < 5000; i++) {
      buf.setUint32(0, Math.floor(rng() * 2 ** 32));
      buf.setUint32(4, Math.floor(rng() * 2 ** 32));
      const v = i % 2 === 0 ? buf.getFloat64(0) : Math.round((rng() - 0.5) * 2 ** (rng() * 60));
      const s = formatValue(v);
      expect(s).toMatch(ABNF_NUMBER);
      if (Number.isNaN(v)) expect(s).toBe('NaN');
      else expect(Number(s)).toBe(v === 0 ? 0 : v);
      if (Number.isInteger(v) && Math.abs(v) < 1e21) expect(s).not.toMatch(/[.eE]/);
    }
  });

  it('refuses a value that is not a number', () => {
    expect(() => formatValue('1' as unknown as number)).toThrow(OpenMetricsError);
  });
});

describe('escaping', () => {
  it('escapes the methods.md §8.2 label value C:\\DIR, newline, "x"', () => {
    // methods.md §8.2: renders as path="C:\\DIR\n\"x\""; OM spec "Escaping".
    const raw = 'C:\\DIR\n"x"';
    expect(escapeLabelValue(raw)).toBe('C:\\\\DIR\\n\\"x\\"');
    const text = renderOpenMetrics([family({ name: 'tidemark_file', samples: [{ labels: { path: raw }, value: 1 }] })]);
    expect(lines(text)[1]).toBe('tidemark_file{path="C:\\\\DIR\\n\\"x\\""} 1');
  });

  it('escapes the methods.md §8.2 HELP example for OpenMetrics and for 0.0.4', () => {
    // methods.md §8.2 and §8.1 rule 5: OM escapes " in HELP; Prometheus 0.0.4 escapes only \ and \n.
    const help = 'Line one\nline "two"';
    expect(escapeHelp(help)).toBe('Line one\\nline \\"two\\"');
    const om = renderOpenMetrics([family({ name: 'tidemark_x', help })]);
    const helpLine = lines(om)[1]!;
    expect(helpLine).toBe('# HELP tidemark_x Line one\\nline \\"two\\"');
    const decoded = unescapeOM(helpLine.slice('# HELP tidemark_x '.length)).split('\n');
    expect(decoded).toEqual(['Line one', 'line "two"']);
    const prom = renderPrometheusText([family({ name: 'tidemark_x', help })]);
    expect(lines(prom)[0]).toBe('# HELP tidemark_x Line one\\nline "two"');
  });

  it('leaves Unicode, NUL and carriage return alone and replaces lone surrogates', () => {
    // OM spec ABNF normal-char: %x00-09 / %x0B-21 / %x23-5B / %x5D-D7FF / %xE000-10FFFF, so NUL,
    // CR and any code point except surrogates are written as they are; a lone UTF-16 surrogate has
    // no UTF-8 encoding (OM spec "Strings": valid UTF-8 only), so it becomes U+FFFD.
    expect(escapeLabelValue('Schicht ß 层 🚀')).toBe('Schicht ß 层 🚀');
    expect(escapeLabelValue('a\u0000b\rc')).toBe('a\u0000b\rc');
    expect(escapeLabelValue('x\uD800y\uDC00')).toBe('x\uFFFDy\uFFFD');
    expect(escapeLabelValue('\uD83D\uDE80')).toBe('🚀');
  });

  it('gives ABNF escaped-strings that decode back, for many random strings', () => {
    // OM spec ABNF escaped-string and "Escaping".
    const rng = mulberry32(21);
    const alphabet = ['a', 'Z', '0', ' ', '\\', '"', '\n', 'n', 'ß', '层', '🚀', '\t', '{', '}', '=', ','];
    for (let i = 0; i < 2000; i++) {
      let s = '';
      const len = Math.floor(rng() * 12);
      for (let j = 0; j < len; j++) s += alphabet[Math.floor(rng() * alphabet.length)]!;
      const e = escapeLabelValue(s);
      expect(e).toMatch(ABNF_ESCAPED_STRING);
      expect(unescapeOM(e)).toBe(s);
    }
  });
});

describe('names', () => {
  it('validates metric names against the ABNF', () => {
    // methods.md §8.2: reject 1abc, a-b, layer.name and the empty name; the ABNF accepts _a, a:b, a1_b.
    for (const bad of ['1abc', 'a-b', 'layer.name', '', 'a b', 'é']) expect(isValidMetricName(bad)).toBe(false);
    for (const good of ['_a', 'a:b', 'a1_b', ':a', 'A']) expect(isValidMetricName(good)).toBe(true);
  });

  it('validates label names against the ABNF', () => {
    // OM spec ABNF label-name = (ALPHA / "_") *(ALPHA / "_" / DIGIT); no colon.
    for (const bad of ['1abc', 'a-b', 'layer.name', '', 'a:b']) expect(isValidLabelName(bad)).toBe(false);
    for (const good of ['_a', 'a1_b', 'layer']) expect(isValidLabelName(good)).toBe(true);
  });

  it('refuses invalid and reserved family names', () => {
    // methods.md §8.1 rule 3 and §8.2: leading "_" is reserved, colons are reserved for aggregation
    // results (OM spec "Name").
    for (const bad of ['1abc', 'a-b', 'layer.name', '', '_a', 'a:b', '__name__']) {
      expect(() => renderOpenMetrics([family({ name: bad })])).toThrow(OpenMetricsError);
    }
    expect(renderOpenMetrics([family({ name: 'a1_b' })])).toBe('# TYPE a1_b gauge\n# EOF\n');
  });

  it('refuses family names ending in a sample suffix', () => {
    // OM spec "Suffixes": "Exposers SHOULD avoid names that could be confused with the suffixes";
    // the spec's own example of a clash: a gauge "foo_created" beside a counter "foo"
    // (methods.md §8.1 rule 6).
    expect(() =>
      renderOpenMetrics([
        family({ name: 'foo', type: 'counter', samples: [{ value: 1 }] }),
        family({ name: 'foo_created', samples: [{ value: 1 }] }),
      ]),
    ).toThrow(/sample suffix/);
    for (const suffix of ['_total', '_created', '_info', '_bucket', '_count', '_sum', '_gcount', '_gsum']) {
      expect(() => renderOpenMetrics([family({ name: `tidemark_x${suffix}` })])).toThrow(OpenMetricsError);
    }
  });

  it('refuses invalid and reserved label names', () => {
    // OM spec "Label": label names beginning with "_" are reserved; ABNF label-name.
    for (const bad of ['_a', 'a:b', '1abc', 'a-b', '']) {
      expect(() => renderOpenMetrics([family({ name: 'tidemark_x', samples: [{ labels: { [bad]: 'v' }, value: 1 }] })])).toThrow(
        OpenMetricsError,
      );
    }
  });

  it('sanitises layer names into valid names', () => {
    // methods.md §8.2: dense/kernel → dense_kernel. The rest is our rule (one "_" per code point
    // outside [a-zA-Z0-9_], an "x" in front when the result would not start with a letter).
    expect(sanitizeName('dense/kernel')).toBe('dense_kernel');
    expect(sanitizeName('layer.name')).toBe('layer_name');
    expect(sanitizeName('a-b')).toBe('a_b');
    expect(sanitizeName('1abc')).toBe('x1abc');
    expect(sanitizeName('_a')).toBe('x_a');
    expect(sanitizeName('a:b')).toBe('a_b');
    expect(sanitizeName('')).toBe('x');
    expect(sanitizeName('Schicht→ß🚀')).toBe('Schicht___');
  });

  it('sanitises any string into an allowed family and label name', () => {
    // The names it makes must pass the ABNF and the reserved-name rules above (methods.md §8.1 rule 3).
    const rng = mulberry32(5);
    const alphabet = ['a', 'Z', '0', '9', '_', ':', '/', '.', '-', ' ', '\n', '"', 'ß', '🚀'];
    for (let i = 0; i < 1000; i++) {
      let s = '';
      const len = Math.floor(rng() * 8);
      for (let j = 0; j < len; j++) s += alphabet[Math.floor(rng() * alphabet.length)]!;
      const name = sanitizeName(s);
      expect(name).toMatch(/^[a-zA-Z][a-zA-Z0-9_]*$/);
      expect(isValidMetricName(name) && isValidLabelName(name)).toBe(true);
    }
  });
});

describe('renderOpenMetrics', () => {
  it('writes the methods.md §8.2 minimal exposition byte for byte', () => {
    const expected =
      '# TYPE tidemark_grad_snr gauge\n' +
      '# HELP tidemark_grad_snr Ratio of mean-gradient norm to std-gradient norm over the window.\n' +
      'tidemark_grad_snr{layer="dense_1"} 2.2079402165819615\n' +
      'tidemark_grad_snr{layer="dense_2"} NaN\n' +
      '# TYPE tidemark_steps counter\n' +
      '# HELP tidemark_steps Optimizer steps observed.\n' +
      'tidemark_steps_total 1500\n' +
      '# TYPE tidemark_weight_distance gauge\n' +
      'tidemark_weight_distance{layer="dense_1"} +Inf\n' +
      '# EOF\n';
    const text = renderOpenMetrics([
      {
        name: 'tidemark_grad_snr',
        type: 'gauge',
        help: 'Ratio of mean-gradient norm to std-gradient norm over the window.',
        samples: [
          { labels: { layer: 'dense_1' }, value: 2.2079402165819615 },
          { labels: { layer: 'dense_2' }, value: NaN },
        ],
      },
      { name: 'tidemark_steps', type: 'counter', help: 'Optimizer steps observed.', samples: [{ value: 1500 }] },
      { name: 'tidemark_weight_distance', type: 'gauge', samples: [{ labels: { layer: 'dense_1' }, value: Infinity }] },
    ]);
    expect(text).toBe(expected);
  });

  it('writes an empty metric set as "# EOF\\n"', () => {
    // OM spec ABNF: exposition = metricset HASH SP eof [ LF ], metricset = *metricfamily.
    expect(renderOpenMetrics([])).toBe('# EOF\n');
  });

  it('writes TYPE, UNIT, HELP in that order, as in the OM spec example', () => {
    // OM spec "Overall Structure" example family process_cpu_seconds (metadata lines copied from
    // it); "MetricFamily metadata": the ordering SHOULD be TYPE, UNIT, HELP. The spec writes the
    // value as 4.20072246e+06; we write the same double as 4200722.46.
    const text = renderOpenMetrics([
      family({
        name: 'process_cpu_seconds',
        type: 'counter',
        unit: 'seconds',
        help: 'Total user and system CPU time spent in seconds.',
        samples: [{ value: 4.20072246e6 }],
      }),
    ]);
    expect(lines(text)).toEqual([
      '# TYPE process_cpu_seconds counter',
      '# UNIT process_cpu_seconds seconds',
      '# HELP process_cpu_seconds Total user and system CPU time spent in seconds.',
      'process_cpu_seconds_total 4200722.46',
      '# EOF',
    ]);
  });

  it('writes the OM spec gauge example byte for byte', () => {
    // OM spec "Overall Structure" example, family go_goroutines.
    const text = renderOpenMetrics([
      family({ name: 'go_goroutines', help: 'Number of goroutines that currently exist.', samples: [{ value: 69 }] }),
    ]);
    expect(text).toBe(
      '# TYPE go_goroutines gauge\n# HELP go_goroutines Number of goroutines that currently exist.\ngo_goroutines 69\n# EOF\n',
    );
  });

  it('writes the OM spec stateset and info examples byte for byte', () => {
    // OM spec "StateSet" (foo with states a, bb, ccc) and "Info" (foo_info with name and version).
    const stateset = renderOpenMetrics([
      family({
        name: 'foo',
        type: 'stateset',
        samples: [
          { labels: { foo: 'a' }, value: 0 },
          { labels: { foo: 'bb' }, value: 1 },
          { labels: { foo: 'ccc' }, value: 0 },
        ],
      }),
    ]);
    expect(stateset).toBe('# TYPE foo stateset\nfoo{foo="a"} 0\nfoo{foo="bb"} 1\nfoo{foo="ccc"} 0\n# EOF\n');
    const info = renderOpenMetrics([
      family({ name: 'foo', type: 'info', samples: [{ labels: { name: 'pretty name', version: '8.2.7' }, value: 1 }] }),
    ]);
    expect(info).toBe('# TYPE foo info\nfoo_info{name="pretty name",version="8.2.7"} 1\n# EOF\n');
  });

  it('leaves out an empty HELP and an empty UNIT', () => {
    // OM spec "MetricFamily metadata": an empty UNIT or HELP "MUST be treated as if no metadata
    // line for the MetricFamily existed".
    expect(renderOpenMetrics([family({ name: 'tidemark_x', help: '', unit: '', samples: [{ value: 1 }] })])).toBe(
      '# TYPE tidemark_x gauge\ntidemark_x 1\n# EOF\n',
    );
  });

  it('writes a sample without labels with no braces', () => {
    // OM spec "Metric": a sample without labels is rendered `bar_seconds_count 0` or with `{}`.
    expect(renderOpenMetrics([family({ name: 'tidemark_x', samples: [{ labels: {}, value: 0 }] })])).toBe(
      '# TYPE tidemark_x gauge\ntidemark_x 0\n# EOF\n',
    );
  });

  it('gives a realistic exposition the structure the OM spec requires', () => {
    // methods.md §8.1 rules 1, 2, 4, 6, 7, 10 checked on the output line by line.
    const text = renderOpenMetrics(realisticFamilies());
    expect(text).not.toContain('\r'); // rule 1 (no carriage return in these inputs)
    expect(text.charCodeAt(0)).not.toBe(0xfeff); // rule 1: no BOM
    expect(text.endsWith('\n# EOF\n')).toBe(true); // rule 2
    const all = lines(text);
    expect(all.filter((l) => l === '# EOF')).toHaveLength(1);
    expect(all.at(-1)).toBe('# EOF');
    const typed = new Map<string, string>();
    const seenMeta = new Set<string>();
    let current: { name: string; type: string; order: number } | null = null;
    const order = { TYPE: 0, UNIT: 1, HELP: 2 } as const;
    const closed = new Set<string>();
    for (const line of all.slice(0, -1)) {
      expect(line).not.toBe(''); // rule 2: no blank lines
      const meta = /^# (TYPE|UNIT|HELP) ([a-zA-Z_:][a-zA-Z0-9_:]*) (.*)$/.exec(line);
      if (line.startsWith('#')) {
        expect(meta).not.toBeNull(); // rule 2: no other # lines
        const [, kind, name, rest] = meta as unknown as [string, 'TYPE' | 'UNIT' | 'HELP', string, string];
        expect(seenMeta.has(`${kind} ${name}`)).toBe(false); // rule 4: at most one of each
        seenMeta.add(`${kind} ${name}`);
        if (current === null || current.name !== name) {
          if (current !== null) closed.add(current.name);
          expect(closed.has(name)).toBe(false); // rule 7: families not interleaved
          expect(kind).toBe('TYPE');
          current = { name, type: rest, order: 0 };
          typed.set(name, rest);
        } else {
          expect(order[kind]).toBeGreaterThan(current.order); // rule 4: TYPE, UNIT, HELP
          current.order = order[kind];
        }
        continue;
      }
      // rule 10: name{labels} value, single spaces, no trailing comma.
      const sample = /^([a-zA-Z_:][a-zA-Z0-9_:]*)(\{(?:[a-zA-Z_][a-zA-Z0-9_]*="(?:[^\\"\n]|\\[n"\\])*"(?:,[a-zA-Z_][a-zA-Z0-9_]*="(?:[^\\"\n]|\\[n"\\])*")*)?\})? (\S+)$/u.exec(
        line,
      );
      expect(sample, line).not.toBeNull();
      const [, sampleName, , value] = sample as unknown as [string, string, string | undefined, string];
      expect(value).toMatch(ABNF_NUMBER);
      expect(current).not.toBeNull();
      const fam = current!;
      const expectedName = fam.type === 'counter' ? `${fam.name}_total` : fam.name; // rule 6
      expect(sampleName).toBe(expectedName);
    }
    expect([...typed.values()]).toEqual(['gauge', 'gauge', 'gauge', 'gauge', 'counter', 'counter', 'gauge']);
  });
});

describe('renderOpenMetrics refuses invalid input', () => {
  it('refuses a family given twice (a second TYPE line, or a family split by another)', () => {
    // methods.md §8.2 invalid cases: a second # TYPE for the same family; samples of
    // tidemark_grad_snr split by another family (OM spec "MetricFamily": MUST NOT be interleaved).
    const snr = (layer: string): Family =>
      family({ name: 'tidemark_grad_snr', samples: [{ labels: { layer }, value: 1 }] });
    expect(() => renderOpenMetrics([snr('a'), snr('b')])).toThrow(/appears twice/);
    expect(() => renderOpenMetrics([snr('a'), family({ name: 'tidemark_other' }), snr('b')])).toThrow(/appears twice/);
  });

  it('never writes a counter sample without _total', () => {
    // methods.md §8.2 invalid case "a counter sample without _total"; OM spec "Counter": the Total
    // sample name MUST have the suffix _total.
    const text = renderOpenMetrics([
      family({ name: 'tidemark_steps', type: 'counter', samples: [{ labels: { run: 'a' }, value: 3 }, { value: 0 }] }),
    ]);
    expect(lines(text)).toEqual(['# TYPE tidemark_steps counter', 'tidemark_steps_total{run="a"} 3', 'tidemark_steps_total 0', '# EOF']);
  });

  it('refuses a negative or NaN counter and accepts -0 and +Inf', () => {
    // OM spec "Counter": a Total is non-NaN and non-decreasing from 0 (methods.md §8.1 rule 6).
    // +Inf is not excluded by the spec.
    const counter = (value: number): Family => family({ name: 'tidemark_steps', type: 'counter', samples: [{ value }] });
    expect(() => renderOpenMetrics([counter(-1)])).toThrow(/non-negative/);
    expect(() => renderOpenMetrics([counter(-Infinity)])).toThrow(/non-negative/);
    expect(() => renderOpenMetrics([counter(NaN)])).toThrow(/NaN/);
    expect(renderOpenMetrics([counter(-0)])).toContain('\ntidemark_steps_total 0\n');
    expect(renderOpenMetrics([counter(Infinity)])).toContain('\ntidemark_steps_total +Inf\n');
  });

  it('refuses duplicate label sets, whatever the label order, with empty values counting as absent', () => {
    // OM spec "MetricFamily": every Metric MUST have a unique LabelSet; "Label": empty label
    // values SHOULD be treated as if the label was not present (methods.md §8.1 rule 7).
    const dup = (a: Record<string, string>, b: Record<string, string>): Family =>
      family({ name: 'tidemark_x', samples: [{ labels: a, value: 1 }, { labels: b, value: 2 }] });
    expect(() => renderOpenMetrics([dup({ layer: 'a' }, { layer: 'a' })])).toThrow(/duplicate label set/);
    expect(() => renderOpenMetrics([dup({ layer: 'a', phase: 'x' }, { phase: 'x', layer: 'a' })])).toThrow(/duplicate/);
    expect(() => renderOpenMetrics([dup({ layer: 'a', note: '' }, { layer: 'a' })])).toThrow(/duplicate/);
    expect(() => renderOpenMetrics([family({ name: 'tidemark_x', samples: [{ value: 1 }, { labels: {}, value: 2 }] })])).toThrow(
      /duplicate/,
    );
    expect(renderOpenMetrics([dup({ layer: 'a' }, { layer: 'b' })])).toContain('tidemark_x{layer="b"} 2');
  });

  it('refuses a unit that is not the suffix of the name, and units on stateset and info', () => {
    // OM spec "MetricFamily metadata": the invalid example "# TYPE foo counter / # UNIT foo seconds";
    // "StateSet"/"Info": such families MUST have an empty Unit string.
    expect(() => renderOpenMetrics([family({ name: 'foo', type: 'counter', unit: 'seconds' })])).toThrow(/suffix/);
    expect(() => renderOpenMetrics([family({ name: 'foo_xseconds', unit: 'seconds' })])).toThrow(/suffix/);
    expect(() => renderOpenMetrics([family({ name: 'foo_seconds', type: 'stateset', unit: 'seconds' })])).toThrow(/no unit/);
    expect(() => renderOpenMetrics([family({ name: 'foo_seconds', type: 'info', unit: 'seconds' })])).toThrow(/no unit/);
    expect(() => renderOpenMetrics([family({ name: 'foo_sec onds', unit: 'sec onds' })])).toThrow(OpenMetricsError);
  });

  it('refuses stateset and info samples with the wrong values or labels', () => {
    // OM spec "StateSet": each state sample has a label named after the family, value 1 or 0;
    // "Info": the value MUST always be 1.
    expect(() => renderOpenMetrics([family({ name: 'foo', type: 'stateset', samples: [{ labels: { foo: 'a' }, value: 2 }] })])).toThrow(
      /0 or 1/,
    );
    expect(() => renderOpenMetrics([family({ name: 'foo', type: 'stateset', samples: [{ labels: { bar: 'a' }, value: 1 }] })])).toThrow(
      /label named "foo"/,
    );
    expect(() => renderOpenMetrics([family({ name: 'foo', type: 'info', samples: [{ labels: { v: '1' }, value: 0 }] })])).toThrow(
      /value 1/,
    );
  });

  it('refuses values and labels of the wrong kind and unknown types', () => {
    // Runtime guards for callers outside TypeScript.
    expect(() => renderOpenMetrics([family({ name: 'tidemark_x', samples: [{ labels: { l: 1 as unknown as string }, value: 1 }] })])).toThrow(
      /must be a string/,
    );
    expect(() => renderOpenMetrics([family({ name: 'tidemark_x', samples: [{ value: '1' as unknown as number }] })])).toThrow(
      /must be a number/,
    );
    expect(() => renderOpenMetrics([family({ name: 'tidemark_x', type: 'histogram' as unknown as 'gauge' })])).toThrow(/unsupported type/);
  });
});

describe('renderPrometheusText (0.0.4 fallback)', () => {
  it('names counters by their sample name, puts HELP before TYPE, and has no UNIT or EOF', () => {
    // Prometheus exposition_formats.md (text 0.0.4): HELP and TYPE before the samples (any order),
    // types counter/gauge/histogram/summary/untyped; methods.md §8.1: "The TYPE line for a counter
    // uses the full sample name", no # EOF. stateset/info as gauge: our mapping (0.0.4 has neither).
    const text = renderPrometheusText([
      family({ name: 'tidemark_steps', type: 'counter', help: 'Steps.', samples: [{ value: 2 }] }),
      family({ name: 'tidemark_window_seconds', unit: 'seconds', help: 'Window length.', samples: [{ value: 0.5 }] }),
      family({ name: 'tidemark_phase', type: 'stateset', samples: [{ labels: { tidemark_phase: 'drift' }, value: 1 }] }),
      family({ name: 'tidemark_build', type: 'info', samples: [{ labels: { version: '0.1.0' }, value: 1 }] }),
      family({ name: 'tidemark_misc', type: 'unknown', samples: [{ value: -Infinity }] }),
    ]);
    expect(lines(text)).toEqual([
      '# HELP tidemark_steps_total Steps.',
      '# TYPE tidemark_steps_total counter',
      'tidemark_steps_total 2',
      '# HELP tidemark_window_seconds Window length.',
      '# TYPE tidemark_window_seconds gauge',
      'tidemark_window_seconds 0.5',
      '# TYPE tidemark_phase gauge',
      'tidemark_phase{tidemark_phase="drift"} 1',
      '# TYPE tidemark_build_info gauge',
      'tidemark_build_info{version="0.1.0"} 1',
      '# TYPE tidemark_misc untyped',
      'tidemark_misc -Inf',
    ]);
    expect(renderPrometheusText([])).toBe('');
  });

  it('applies the same checks as the OpenMetrics writer', () => {
    expect(() => renderPrometheusText([family({ name: 'a-b' })])).toThrow(OpenMetricsError);
  });
});

// ---------------------------------------------------------------------------------------------
// A realistic exposition with awkward layer names (used by the structure test above).

const LAYERS = [
  'dense_1',
  'conv2d/kernel',
  'say "hi"',
  'C:\\models\\layer\\',
  'two\nlines',
  'Schicht ß → 层 🚀',
  'tab\there, {braces}=,"',
];
const PHASES = ['drift', 'diffusion', 'undetermined'] as const;

/** Families shaped like what `tidemark serve` will expose, with awkward layer names. */
function realisticFamilies(): Family[] {
  const perLayer = (f: (i: number) => number): Family['samples'] => LAYERS.map((layer, i) => ({ labels: { layer }, value: f(i) }));
  const specials = [2.2079402165819615, NaN, Infinity, -Infinity, 1e21, -0, 1.89e-7];
  return [
    {
      name: 'tidemark_grad_snr',
      type: 'gauge',
      help: 'Ratio of mean-gradient norm to std-gradient norm over the window.',
      samples: perLayer((i) => specials[i % specials.length]!),
    },
    {
      name: 'tidemark_grad_noise_scale',
      type: 'gauge',
      help: 'Simple gradient noise scale B_simple = tr(Sigma) / |G|^2, in examples.',
      samples: perLayer((i) => 32 * (i + 1)),
    },
    {
      name: 'tidemark_weight_distance',
      type: 'gauge',
      help: 'Euclidean distance of the layer weights from their initial values.\nSecond line: C:\\path.',
      samples: perLayer((i) => 0.125 * i),
    },
    {
      name: 'tidemark_window_duration_seconds',
      type: 'gauge',
      unit: 'seconds',
      help: 'Wall-clock length of the last window.',
      samples: [{ value: 0.75 }],
    },
    { name: 'tidemark_steps', type: 'counter', help: 'Optimizer steps observed.', samples: [{ value: 1500 }] },
    { name: 'tidemark_windows', type: 'counter', help: 'Windows closed.', samples: [{ value: 30 }] },
    {
      name: 'tidemark_layer_phase',
      type: 'gauge',
      help: 'Current phase of each layer: 1 for the current phase, 0 for the others.',
      samples: LAYERS.flatMap((layer, i) =>
        PHASES.map((phase, p) => ({ labels: { layer, phase }, value: p === i % PHASES.length ? 1 : 0 })),
      ),
    },
  ];
}
