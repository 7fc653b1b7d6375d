import { describe, expect, it } from 'vitest';
import { checkOptions, closestName, describeRule, type OptionSchema } from '../src/option-check.js';

const RULES: OptionSchema = {
  share: { type: 'number', min: 0, max: 1 },
  count: { type: 'number', integer: true, min: 2 },
  positive: { type: 'number', above: 0 },
  name: { type: 'string', nonEmpty: true },
  mode: { type: 'string', oneOf: ['a', 'b'] },
  on: { type: 'boolean' },
  callback: { type: 'function' },
};

function codeOf(f: () => unknown): string | undefined {
  try {
    f();
  } catch (e) {
    return (e as { code?: string }).code;
  }
  return undefined;
}

function messageOf(f: () => unknown): string {
  try {
    f();
  } catch (e) {
    return (e as Error).message;
  }
  return '';
}

describe('checkOptions', () => {
  it('fills defaults under the given values and freezes the copy', () => {
    const input = { share: 0.5 };
    const out = checkOptions<{ share: number; count: number }>(input, RULES, { count: 4 });
    expect(out).toEqual({ share: 0.5, count: 4 });
    expect(Object.isFrozen(out)).toBe(true);
    expect(out).not.toBe(input);
    expect(checkOptions(undefined, RULES, { count: 4 })).toEqual({ count: 4 });
    // undefined counts as not given
    expect(checkOptions({ count: undefined }, RULES, { count: 4 })).toEqual({ count: 4 });
  });

  it.each([
    ['share', 2, "Option 'phases.share' must be a number from 0 to 1; received 2."],
    ['share', -1, "Option 'phases.share' must be a number from 0 to 1; received -1."],
    ['count', 2.5, "Option 'phases.count' must be an integer ≥ 2; received 2.5."],
    ['count', 1, "Option 'phases.count' must be an integer ≥ 2; received 1."],
    ['positive', 0, "Option 'phases.positive' must be a number > 0; received 0."],
    ['positive', Number.NaN, "Option 'phases.positive' must be a number > 0; received NaN."],
    ['positive', Infinity, "Option 'phases.positive' must be a number > 0; received Infinity."],
    ['positive', '3', "Option 'phases.positive' must be a number > 0; received '3'."],
    ['name', '', "Option 'phases.name' must be a non-empty string; received ''."],
    ['mode', 'c', "Option 'phases.mode' must be one of 'a', 'b'; received 'c'."],
    ['on', 1, "Option 'phases.on' must be true or false; received 1."],
    ['callback', {}, "Option 'phases.callback' must be a function; received {}."],
  ])('refuses %s = %s, naming the option, its range and the value', (name, value, message) => {
    const f = () => checkOptions({ [name]: value }, RULES, {}, { prefix: 'phases.' });
    expect(codeOf(f)).toBe('TIDEMARK_ERR_OPTION_INVALID');
    expect(messageOf(f)).toBe(message);
  });

  it('raises a RangeError for a number out of range and a TypeError for a wrong type', () => {
    expect(() => checkOptions({ share: 2 }, RULES)).toThrow(RangeError);
    expect(() => checkOptions({ share: 'x' }, RULES)).toThrow(TypeError);
  });

  it('refuses an unknown name and suggests the closest known one, with the owner', () => {
    const f = () => checkOptions({ heartbeatIntervl: 5 }, { heartbeatIntervalMs: { type: 'number' } }, {}, { owner: 'new StoreSink()' });
    expect(codeOf(f)).toBe('TIDEMARK_ERR_OPTION_UNKNOWN');
    expect(messageOf(f)).toBe("Unknown option 'heartbeatIntervl' of new StoreSink(). Did you mean 'heartbeatIntervalMs'?");
    expect(messageOf(() => checkOptions({ zzz: 1 }, { alpha: { type: 'number' } }))).toBe("Unknown option 'zzz'. Known: alpha.");
  });

  it('refuses a non-object', () => {
    expect(codeOf(() => checkOptions(5, RULES))).toBe('TIDEMARK_ERR_OPTION_INVALID');
    expect(messageOf(() => checkOptions([], RULES, {}, { prefix: 'advice.' }))).toBe("'advice' must be an object; received [].");
  });
});

describe('closestName', () => {
  it('finds names within two edits and names the input is a prefix of (old names without the Ms unit)', () => {
    expect(closestName('val_los', ['val_loss', 'loss'])).toBe('val_loss');
    expect(closestName('flushInterval', ['flushIntervalMs', 'flushAt'])).toBe('flushIntervalMs');
    expect(closestName('busyTimeout', ['busyTimeoutMs', 'readonly'])).toBe('busyTimeoutMs');
    expect(closestName('xyz', ['alpha', 'beta'])).toBeNull();
  });
});

describe('describeRule', () => {
  it('says ranges in words', () => {
    expect(describeRule({ type: 'number', min: 0, max: 1 })).toBe('a number from 0 to 1');
    expect(describeRule({ type: 'number', above: 0, below: 1 })).toBe('a number > 0 and < 1');
    expect(describeRule({ type: 'number', integer: true, min: 0, max: 65535 })).toBe('an integer from 0 to 65535');
    expect(describeRule({ type: 'number' })).toBe('a finite number');
  });
});

describe('nullable strings', () => {
  it('take null as none, and say so in the range', () => {
    const rules: OptionSchema = { token: { type: 'string', nonEmpty: true, nullable: true } };
    expect(checkOptions({ token: null }, rules)).toEqual({ token: null });
    expect(checkOptions({ token: 'abc' }, rules)).toEqual({ token: 'abc' });
    expect(() => checkOptions({ token: '' }, rules)).toThrow("Option 'token' must be a non-empty string or null; received ''.");
    expect(() => checkOptions({ token: 5 }, rules)).toThrow(TypeError);
  });
});
