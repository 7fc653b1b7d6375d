#!/usr/bin/env node
import { main } from './main.js';

// `tidemark export … | head` closes the pipe early: that is the reader's choice, not an error.
process.stdout.on('error', (error: NodeJS.ErrnoException) => {
  if (error.code === 'EPIPE') process.exit(0);
  throw error;
});

process.exitCode = await main(process.argv.slice(2));
