import { defineConfig } from 'vitest/config';

// Only the optional native-backend check; see test/optional/tfjs-node.check.ts.
export default defineConfig({
  test: { include: ['test/optional/*.check.ts'], testTimeout: 60_000 },
});
