import { parseArgs } from 'node:util';

/** The `--quick` flag of a bench that takes no other: true or false, or null after printing `usage` for `--help`. */
export function quickFlag(usage: string): boolean | null {
  const { values } = parseArgs({ options: { quick: { type: 'boolean', default: false }, help: { type: 'boolean', short: 'h' } } });
  if (values.help) {
    console.log(usage);
    return null;
  }
  return values.quick === true;
}
