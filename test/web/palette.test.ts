import { describe, expect, it } from 'vitest';
import { LINE_COLOURS, layerStyle, NETWORK_STYLE, OKABE_ITO, PHASE_FILL, VAL_LOSS_STYLE } from '../../src/web/palette.js';

describe('palette', () => {
  it('gives phases colours no line takes, so one colour never means a phase and a layer or a run', () => {
    const lines = new Set(LINE_COLOURS.map((c) => c.toLowerCase()));
    for (const fill of Object.values(PHASE_FILL)) expect(lines.has(fill.toLowerCase())).toBe(false);
    // The first seven layers (and the runs of a comparison, coloured the same way) take the Okabe & Ito colours.
    for (let i = 0; i < 7; i++) expect(lines.has(layerStyle(i).stroke.toLowerCase())).toBe(true);
  });

  it('draws val_loss in the loss line\'s black, not in a layer\'s colour', () => {
    expect(VAL_LOSS_STYLE.stroke).toBe(NETWORK_STYLE.stroke);
    expect(VAL_LOSS_STYLE.stroke).not.toBe(OKABE_ITO.vermillion);
    expect(VAL_LOSS_STYLE.dash.length).toBeGreaterThan(0);
  });
});
