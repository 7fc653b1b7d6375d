/**
 * A small, pure writer of the OpenMetrics 1.0 text exposition (what `/metrics` serves), with the
 * Prometheus text format 0.0.4 as a fallback rendering of the same families.
 *
 * Rules (methods.md §8.1, from the OpenMetrics 1.0 specification and the Prometheus exposition
 * format documentation):
 *  - families are written one after another, each as `# TYPE`, `# UNIT`, `# HELP` (in that order,
 *    each at most once; an empty unit or help is left out) followed by all of its samples, so
 *    families and metrics are never interleaved;
 *  - the exposition ends with `# EOF\n`; lines end with `\n` only; there are no blank lines and no
 *    comments;
 *  - label values and HELP text escape backslash, double quote and line feed;
 *  - counters: the family `foo` is written as `# TYPE foo counter` and its samples as `foo_total`;
 *    info: samples `foo_info` with the value 1; gauge, stateset and unknown: samples `foo`;
 *  - every label set is unique within its family.
 *
 * Anything that would make an invalid exposition (bad names, duplicate families or label sets,
 * a negative counter, a unit that is not a suffix of the name, ...) is a programming error in the
 * caller and throws an {@link OpenMetricsError}; nothing is silently repaired except lone UTF-16
 * surrogates, which cannot be encoded as UTF-8 and become U+FFFD.
 *
 * Enumerations such as a layer's phase: OpenMetrics has the `stateset` type for them, and this
 * writer renders it, but the 0.0.4 text format has no such type. The server therefore exposes phases
 * as a `gauge` with a state label (1 for the current state, 0 for the others), which reads the same
 * in both formats.
 */

/** The HTTP Content-Type of {@link renderOpenMetrics} output (OpenMetrics 1.0, "Overall Structure"). */
export const OPENMETRICS_CONTENT_TYPE = 'application/openmetrics-text; version=1.0.0; charset=utf-8';

/**
 * The HTTP Content-Type of {@link renderPrometheusText} output: `text/plain; version=0.0.4` per the
 * Prometheus exposition format documentation; the `charset=utf-8` parameter is what client
 * libraries usually add (from memory).
 */
export const PROMETHEUS_TEXT_CONTENT_TYPE = 'text/plain; version=0.0.4; charset=utf-8';

/** The OpenMetrics types this writer supports (histogram, gaugehistogram and summary are not needed yet). */
export type MetricType = 'gauge' | 'counter' | 'stateset' | 'info' | 'unknown';

/** One sample: a label set (possibly empty) and a value. */
export interface Sample {
  /** Label name → value. Names follow `[a-zA-Z][a-zA-Z0-9_]*`; values may be any string. */
  readonly labels?: Readonly<Record<string, string>>;
  readonly value: number;
}

/** One metric family. */
export interface Family {
  /**
   * The family name: `[a-zA-Z][a-zA-Z0-9_]*` (the OpenMetrics grammar without the reserved leading
   * underscore and colons), not ending in a sample suffix (`_total`, `_created`, `_info`,
   * `_bucket`, `_count`, `_sum`, `_gcount`, `_gsum`). For a counter, the name without `_total`.
   */
  readonly name: string;
  readonly type: MetricType;
  /** Short description; an empty string counts as absent. */
  readonly help?: string;
  /** Unit, e.g. `seconds`; must be the suffix `_<unit>` of the name. Empty counts as absent. */
  readonly unit?: string;
  readonly samples: readonly Sample[];
}

/** A family, sample or name that cannot be exposed: a programming error in the caller. */
export class OpenMetricsError extends Error {
  constructor(message: string) {
    super(message);
    this.name = 'OpenMetricsError';
  }
}

const METRIC_NAME_ABNF = /^[a-zA-Z_:][a-zA-Z0-9_:]*$/;
const LABEL_NAME_ABNF = /^[a-zA-Z_][a-zA-Z0-9_]*$/;
const UNIT_ABNF = /^[a-zA-Z0-9_:]*$/;
/** Sample-name suffixes of the OpenMetrics text format, which family names should not end with. */
const RESERVED_SUFFIXES = ['_total', '_created', '_info', '_bucket', '_count', '_sum', '_gcount', '_gsum'];
const LONE_SURROGATE = /[\uD800-\uDBFF](?![\uDC00-\uDFFF])|(?<![\uD800-\uDBFF])[\uDC00-\uDFFF]/g;

/** True when `name` matches the OpenMetrics `metricname` production `[a-zA-Z_:][a-zA-Z0-9_:]*`. */
export function isValidMetricName(name: string): boolean {
  return METRIC_NAME_ABNF.test(name);
}

/** True when `name` matches the OpenMetrics `label-name` production `[a-zA-Z_][a-zA-Z0-9_]*`. */
export function isValidLabelName(name: string): boolean {
  return LABEL_NAME_ABNF.test(name);
}

/**
 * Turns an arbitrary string (a layer name such as `dense/kernel`) into a name usable as a metric
 * name part or label name: every character outside `[a-zA-Z0-9_]` becomes `_` (one `_` per Unicode
 * code point), and an `x` is put in front when the result would be empty or start with a digit or
 * an underscore. Distinct inputs can give the same result (`a/b`, `a.b`): keep identities such as
 * layer names in label values, which may be any string.
 */
export function sanitizeName(raw: string): string {
  let out = '';
  for (const ch of raw) out += /^[a-zA-Z0-9_]$/.test(ch) ? ch : '_';
  return /^[a-zA-Z]/.test(out) ? out : `x${out}`;
}

/**
 * Renders a sample value: integers without a decimal point, other finite numbers in the shortest
 * form that reads back to the same double (`0.1`, `1e-7`, `1e+21`), `NaN`, `+Inf`, `-Inf`.
 * Negative zero is written `0`.
 */
export function formatValue(v: number): string {
  if (typeof v !== 'number') throw new OpenMetricsError(`A sample value must be a number; got ${typeof v}.`);
  if (Number.isNaN(v)) return 'NaN';
  if (v === Infinity) return '+Inf';
  if (v === -Infinity) return '-Inf';
  // Number.prototype.toString gives the shortest round-trip digits; it writes integers below 1e21
  // without a point or exponent, and String(-0) is '0'.
  return String(v);
}

function wellFormed(s: string): string {
  return s.replace(LONE_SURROGATE, '\uFFFD');
}

/** Escapes a label value (both formats): `\` → `\\`, `"` → `\"`, line feed → `\n`. */
export function escapeLabelValue(s: string): string {
  return wellFormed(s).replace(/[\\"\n]/g, (c) => (c === '\n' ? '\\n' : `\\${c}`));
}

/** Escapes OpenMetrics HELP text: the same three escapes as label values. */
export function escapeHelp(s: string): string {
  return escapeLabelValue(s);
}

/** Escapes Prometheus 0.0.4 HELP text, where only `\` and line feed are escaped. */
function escapeHelpPrometheus(s: string): string {
  return wellFormed(s).replace(/[\\\n]/g, (c) => (c === '\n' ? '\\n' : '\\\\'));
}

function fail(family: string, message: string): never {
  throw new OpenMetricsError(`Metric family "${family}": ${message}`);
}

function checkFamilyName(name: unknown): asserts name is string {
  if (typeof name !== 'string' || !isValidMetricName(name)) {
    throw new OpenMetricsError(
      `Invalid metric family name ${JSON.stringify(name)}: names must match [a-zA-Z_:][a-zA-Z0-9_:]* (use sanitizeName).`,
    );
  }
  if (name.startsWith('_')) fail(name, 'names starting with "_" are reserved.');
  if (name.includes(':')) fail(name, 'colons are reserved for aggregation results and must not be exposed.');
  const suffix = RESERVED_SUFFIXES.find((s) => name.endsWith(s));
  if (suffix !== undefined) {
    fail(name, `the name ends in "${suffix}", a sample suffix of the text format; give counters their name without "_total".`);
  }
}

/** A key for the label set, with empty-valued labels dropped (OpenMetrics treats them as absent). */
function labelSetKey(labels: Readonly<Record<string, string>>): string {
  const pairs = Object.entries(labels)
    .filter(([, v]) => v !== '')
    .sort(([a], [b]) => (a < b ? -1 : a > b ? 1 : 0));
  return JSON.stringify(pairs);
}

function checkSample(f: Family, sample: Sample, seen: Set<string>): void {
  const labels = sample.labels ?? {};
  if (typeof labels !== 'object' || labels === null) fail(f.name, 'sample labels must be an object.');
  for (const [k, v] of Object.entries(labels)) {
    if (!isValidLabelName(k)) fail(f.name, `invalid label name ${JSON.stringify(k)}: must match [a-zA-Z_][a-zA-Z0-9_]*.`);
    if (k.startsWith('_')) fail(f.name, `label name "${k}" starts with "_", which is reserved.`);
    if (typeof v !== 'string') fail(f.name, `the value of label "${k}" must be a string; got ${typeof v}.`);
  }
  const v = sample.value;
  if (typeof v !== 'number') fail(f.name, `a sample value must be a number; got ${typeof v}.`);
  switch (f.type) {
    case 'counter':
      if (Number.isNaN(v) || v < 0) fail(f.name, `a counter total must be non-negative and not NaN; got ${v}.`);
      break;
    case 'stateset':
      if (v !== 0 && v !== 1) fail(f.name, `a stateset sample must be 0 or 1; got ${v}.`);
      if (typeof labels[f.name] !== 'string') {
        fail(f.name, `each stateset sample needs a label named "${f.name}" holding the state name.`);
      }
      break;
    case 'info':
      if (v !== 1) fail(f.name, `an info sample must have the value 1; got ${v}.`);
      break;
    default:
      break;
  }
  const key = labelSetKey(labels);
  if (seen.has(key)) fail(f.name, `duplicate label set ${key} (empty label values count as absent).`);
  seen.add(key);
}

function checkFamilies(families: readonly Family[]): void {
  if (!Array.isArray(families)) throw new OpenMetricsError('renderOpenMetrics expects an array of families.');
  const names = new Set<string>();
  for (const f of families) {
    checkFamilyName(f.name);
    if (names.has(f.name)) fail(f.name, 'the family appears twice; all its samples must be in one family.');
    names.add(f.name);
    if (!['gauge', 'counter', 'stateset', 'info', 'unknown'].includes(f.type)) {
      fail(f.name, `unsupported type ${JSON.stringify(f.type)}.`);
    }
    if (f.help !== undefined && typeof f.help !== 'string') fail(f.name, 'help must be a string.');
    const unit = f.unit ?? '';
    if (typeof unit !== 'string') fail(f.name, 'unit must be a string.');
    if (unit !== '') {
      if (!UNIT_ABNF.test(unit)) fail(f.name, `invalid unit ${JSON.stringify(unit)}.`);
      if (f.type === 'stateset' || f.type === 'info') fail(f.name, `a ${f.type} must have no unit.`);
      if (!f.name.endsWith(`_${unit}`)) fail(f.name, `the unit "${unit}" must be the suffix "_${unit}" of the name.`);
    }
    if (!Array.isArray(f.samples)) fail(f.name, 'samples must be an array.');
    const seen = new Set<string>();
    for (const s of f.samples) checkSample(f, s, seen);
  }
}

function sampleName(f: Family): string {
  if (f.type === 'counter') return `${f.name}_total`;
  if (f.type === 'info') return `${f.name}_info`;
  return f.name;
}

function sampleLine(name: string, sample: Sample): string {
  const entries = Object.entries(sample.labels ?? {});
  const labels =
    entries.length === 0 ? '' : `{${entries.map(([k, v]) => `${k}="${escapeLabelValue(v)}"`).join(',')}}`;
  return `${name}${labels} ${formatValue(sample.value)}`;
}

/**
 * Renders families as an OpenMetrics 1.0 text exposition, ending with `# EOF\n`. Families come out
 * in the given order, samples in the given order, labels in each object's key order. Throws an
 * {@link OpenMetricsError} for anything that would make the exposition invalid.
 */
export function renderOpenMetrics(families: readonly Family[]): string {
  checkFamilies(families);
  const lines: string[] = [];
  for (const f of families) {
    lines.push(`# TYPE ${f.name} ${f.type}`);
    if (f.unit !== undefined && f.unit !== '') lines.push(`# UNIT ${f.name} ${f.unit}`);
    if (f.help !== undefined && f.help !== '') lines.push(`# HELP ${f.name} ${escapeHelp(f.help)}`);
    const name = sampleName(f);
    for (const s of f.samples) lines.push(sampleLine(name, s));
  }
  lines.push('# EOF');
  return `${lines.join('\n')}\n`;
}

const PROMETHEUS_TYPE: Record<MetricType, string> = {
  gauge: 'gauge',
  counter: 'counter',
  // 0.0.4 has no stateset or info types; both are plain gauges there (their samples are 0/1 and 1).
  stateset: 'gauge',
  info: 'gauge',
  unknown: 'untyped',
};

/**
 * Renders the same families in the Prometheus text format 0.0.4 (for clients that do not accept
 * OpenMetrics): `# HELP` then `# TYPE`, both under the sample name (`foo_total` for a counter),
 * HELP escaping only `\` and line feed, no `# UNIT`, no `# EOF`. The same checks apply.
 */
export function renderPrometheusText(families: readonly Family[]): string {
  checkFamilies(families);
  const lines: string[] = [];
  for (const f of families) {
    const name = sampleName(f);
    if (f.help !== undefined && f.help !== '') lines.push(`# HELP ${name} ${escapeHelpPrometheus(f.help)}`);
    lines.push(`# TYPE ${name} ${PROMETHEUS_TYPE[f.type]}`);
    for (const s of f.samples) lines.push(sampleLine(name, s));
  }
  return lines.length === 0 ? '' : `${lines.join('\n')}\n`;
}
