/** The built `tidemark` command, run as a user runs it (npm install builds dist/ through `prepare`). */
import { spawnSync, type SpawnSyncReturns } from 'node:child_process';

export const BUILT_BIN = 'dist/cli/bin.js';

export function builtCli(...args: string[]): SpawnSyncReturns<string> {
  return spawnSync(process.execPath, [BUILT_BIN, ...args], { encoding: 'utf8' });
}
