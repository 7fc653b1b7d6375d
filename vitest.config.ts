import { defineConfig } from 'vitest/config';

export default defineConfig({
  test: {
    include: ['test/**/*.test.ts'],
    // tfjs training tests are CPU-heavy; two cores, so at most two files at once.
    maxWorkers: 2,
    testTimeout: 60_000,
    // Monitors left on the default store write to an in-memory SQLite database, not into the checkout.
    env: { TIDEMARK_DB: ':memory:' },
    // Real-data runs train in beforeAll; on a loaded 2-core machine that can take minutes.
    hookTimeout: 240_000,
  },
});
