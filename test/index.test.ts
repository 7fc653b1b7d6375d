import { describe, expect, it } from 'vitest';
import * as api from '../src/index.js';

describe('public API', () => {
  it('exports exactly the documented names', () => {
    expect(Object.keys(api).sort()).toEqual(
      [
        'ERROR_CODES',
        'JsonlSink',
        'MemorySink',
        'StoreSink',
        'TidemarkError',
        'TidemarkRangeError',
        'TidemarkTypeError',
        'analysis',
        'decodeRecord',
        'defaultStore',
        'encodeRecord',
        'exportRun',
        'importJsonl',
        'monitor',
        'openStore',
        'openPostgresStore',
        'connectStore',
        'RemoteSink',
        'resendSpill',
        'startServer',
        'buildServer',
        'DEFAULT_PORT',
        'PROTOCOL_VERSION',
        'MAX_FRAME_BYTES',
        'groupReport',
        'sweepOf',
        'matchLayers',
        'GROUP_ALIGNS',
        'SWEEP_OUTCOMES',
      ].sort(),
    );
  });

  it('offers the pure functions of design.md under analysis', () => {
    for (const name of ['gradientStats', 'snrFloor', 'travelExponent', 'fitPowerLaw', 'lttb', 'ShiftedMoments', 'detectPhases', 'adviseStop', 'binnedInformation', 'pairwiseInformationBounds', 'detectCompression']) {
      expect(typeof (api.analysis as Record<string, unknown>)[name]).toBe('function');
    }
  });
});
