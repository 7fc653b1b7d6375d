/**
 * The one way options are taken in, by monitor(), the CLI and every public constructor: copied, every
 * name checked (a misspelt one gets the closest known name), every value checked against its type and
 * range, defaults filled in, and the result frozen. A typo or an out-of-range number fails before
 * training starts, with a coded error that names the option, its range and the value received.
 */
import { TidemarkRangeError, TidemarkTypeError } from './errors.js';

function editDistance(a: string, b: string): number {
  const row = Array.from({ length: b.length + 1 }, (_, j) => j);
  for (let i = 1; i <= a.length; i++) {
    let prev = row[0]!;
    row[0] = i;
    for (let j = 1; j <= b.length; j++) {
      const cur = row[j]!;
      row[j] = Math.min(row[j]! + 1, row[j - 1]! + 1, prev + (a[i - 1] === b[j - 1] ? 0 : 1));
      prev = cur;
    }
  }
  return row[b.length]!;
}

/**
 * The known name closest to `name` (case-insensitive), or null when none is close: within two edits, or
 * a known name that starts with it or that it starts with (`heartbeatInterval` → `heartbeatIntervalMs`).
 */
export function closestName(name: string, known: readonly string[]): string | null {
  let best: string | null = null;
  let bestD = 3;
  const lower = name.toLowerCase();
  for (const k of known) {
    const kl = k.toLowerCase();
    // A time option named without its unit (`flushInterval` for `flushIntervalMs`) is one edit away.
    const bare = kl.endsWith('ms') ? kl.slice(0, -2) : kl;
    const d =
      lower.length >= 4 && (kl.startsWith(lower) || lower.startsWith(kl))
        ? 1
        : Math.min(editDistance(lower, kl), bare === kl ? Infinity : 1 + editDistance(lower, bare));
    if (d < bestD) {
      bestD = d;
      best = k;
    }
  }
  return best;
}

/** What one option may hold. Numbers are always finite; ranges are inclusive unless `above`/`below`. */
export type OptionRule =
  | { type: 'number'; integer?: boolean; min?: number; max?: number; above?: number; below?: number }
  | { type: 'boolean' }
  /** `nullable`: null is accepted too, meaning "none" (a server without a token). */
  | { type: 'string'; oneOf?: readonly string[]; nonEmpty?: boolean; nullable?: boolean }
  | { type: 'function' }
  /** Checked by the caller (objects, unions); only the name is checked here. */
  | { type: 'any' };

export type OptionSchema = Readonly<Record<string, OptionRule>>;

export interface CheckContext {
  /** Prefixed to every name in messages: `'phases.'` gives `phases.networkShare`. Default none. */
  prefix?: string;
  /** Whose options these are, for messages: `'new StoreSink()'`. Default none. */
  owner?: string;
}

/** `a number from 0 to 1`, `an integer ≥ 2`, `a number > 0`: the range a rule allows, in words. */
export function describeRule(rule: OptionRule): string {
  switch (rule.type) {
    case 'boolean':
      return 'true or false';
    case 'function':
      return 'a function';
    case 'any':
      return 'a value';
    case 'string': {
      const what = rule.oneOf !== undefined ? `one of ${rule.oneOf.map((s) => `'${s}'`).join(', ')}` : rule.nonEmpty === true ? 'a non-empty string' : 'a string';
      return rule.nullable === true ? `${what} or null` : what;
    }
  }
  const what = rule.integer === true ? 'an integer' : 'a number';
  const low = rule.min !== undefined ? { v: rule.min, open: false } : rule.above !== undefined ? { v: rule.above, open: true } : null;
  const high = rule.max !== undefined ? { v: rule.max, open: false } : rule.below !== undefined ? { v: rule.below, open: true } : null;
  if (low !== null && high !== null && !low.open && !high.open) return `${what} from ${low.v} to ${high.v}`;
  const parts: string[] = [];
  if (low !== null) parts.push(`${low.open ? '>' : '≥'} ${low.v}`);
  if (high !== null) parts.push(`${high.open ? '<' : '≤'} ${high.v}`);
  return parts.length === 0 ? `a finite ${what.slice(what.indexOf(' ') + 1)}` : `${what} ${parts.join(' and ')}`;
}

function shown(v: unknown): string {
  if (typeof v === 'string') return `'${v}'`;
  if (typeof v === 'function') return 'a function';
  if (typeof v === 'number' || typeof v === 'bigint' || v === undefined) return String(v);
  try {
    return JSON.stringify(v) ?? String(v);
  } catch {
    return Object.prototype.toString.call(v);
  }
}

/** True when `value` satisfies `rule`. */
export function satisfies(rule: OptionRule, value: unknown): boolean {
  switch (rule.type) {
    case 'any':
      return true;
    case 'boolean':
      return typeof value === 'boolean';
    case 'function':
      return typeof value === 'function';
    case 'string':
      if (value === null && rule.nullable === true) return true;
      return (
        typeof value === 'string' &&
        (rule.oneOf === undefined || rule.oneOf.includes(value)) &&
        (rule.nonEmpty !== true || value.length > 0)
      );
    case 'number':
      if (typeof value !== 'number' || !Number.isFinite(value)) return false;
      if (rule.integer === true && !Number.isInteger(value)) return false;
      if (rule.min !== undefined && value < rule.min) return false;
      if (rule.max !== undefined && value > rule.max) return false;
      if (rule.above !== undefined && !(value > rule.above)) return false;
      if (rule.below !== undefined && !(value < rule.below)) return false;
      return true;
  }
}

/** The coded error for a value outside its rule: a RangeError for a number of the right type, else a TypeError. */
export function invalidOption(name: string, rule: OptionRule, value: unknown, context: CheckContext = {}): Error {
  const owner = context.owner !== undefined ? ` of ${context.owner}` : '';
  const message = `Option '${context.prefix ?? ''}${name}'${owner} must be ${describeRule(rule)}; received ${shown(value)}.`;
  return rule.type === 'number' && typeof value === 'number'
    ? new TidemarkRangeError('TIDEMARK_ERR_OPTION_INVALID', message)
    : new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', message);
}

/** The coded error for a name not in `known`, with the closest known name when there is one. */
export function unknownOption(name: string, known: readonly string[], context: CheckContext = {}): TidemarkTypeError {
  const best = closestName(name, known);
  const owner = context.owner !== undefined ? ` of ${context.owner}` : '';
  const hint = best !== null ? ` Did you mean '${context.prefix ?? ''}${best}'?` : ` Known: ${known.join(', ')}.`;
  return new TidemarkTypeError('TIDEMARK_ERR_OPTION_UNKNOWN', `Unknown option '${context.prefix ?? ''}${name}'${owner}.${hint}`);
}

/**
 * Checks `input` (undefined means none given) against `schema` and returns a frozen copy with `defaults`
 * under the given values. An option given as `undefined` counts as not given.
 *
 * @throws TidemarkTypeError `TIDEMARK_ERR_OPTION_UNKNOWN` for a name the schema lacks;
 *   TidemarkRangeError / TidemarkTypeError `TIDEMARK_ERR_OPTION_INVALID` for a value outside its rule.
 */
export function checkOptions<T extends object>(
  input: unknown,
  schema: OptionSchema,
  defaults: Partial<T> = {},
  context: CheckContext = {},
): Readonly<T> {
  const out: Record<string, unknown> = { ...defaults };
  if (input === undefined) return Object.freeze(out) as Readonly<T>;
  if (input === null || typeof input !== 'object' || Array.isArray(input)) {
    const label = context.prefix !== undefined && context.prefix !== '' ? `'${context.prefix.replace(/\.$/, '')}'` : 'options';
    throw new TidemarkTypeError(
      'TIDEMARK_ERR_OPTION_INVALID',
      `${context.owner !== undefined ? `${context.owner}: ` : ''}${label} must be an object; received ${shown(input)}.`,
    );
  }
  const known = Object.keys(schema);
  for (const [name, value] of Object.entries(input as Record<string, unknown>)) {
    const rule = schema[name];
    if (rule === undefined) throw unknownOption(name, known, context);
    if (value === undefined) continue;
    if (!satisfies(rule, value)) throw invalidOption(name, rule, value, context);
    out[name] = value;
  }
  return Object.freeze(out) as Readonly<T>;
}
