/**
 * JSON schemas of the WebSocket messages (protocol v1), compiled once. The records inside a batch are
 * checked field by field by the store, which refuses the whole batch on the first bad one.
 */
import type { Ajv, ValidateFunction } from 'ajv';
import type { BatchMessage, ViewerMessage } from '../protocol/messages.js';

/** Records per batch at most; the remote writer sends 500. */
export const MAX_BATCH_RECORDS = 10_000;

const id = { type: 'string', minLength: 1, maxLength: 200 } as const;

export function batchSchema(ajv: Ajv): ValidateFunction<BatchMessage> {
  return ajv.compile<BatchMessage>({
    type: 'object',
    properties: {
      v: { const: 1 },
      type: { const: 'batch' },
      run: id,
      seq: { type: 'integer', minimum: 0, maximum: Number.MAX_SAFE_INTEGER },
      records: {
        type: 'array',
        maxItems: MAX_BATCH_RECORDS,
        items: { type: 'object', properties: { type: { enum: ['run', 'window', 'marker', 'warning', 'end'] } }, required: ['type'] },
      },
    },
    required: ['v', 'type', 'run', 'seq', 'records'],
    additionalProperties: false,
  });
}

export function viewerSchema(ajv: Ajv): ValidateFunction<ViewerMessage> {
  return ajv.compile<ViewerMessage>({
    oneOf: [
      {
        type: 'object',
        properties: {
          v: { const: 1 },
          type: { const: 'subscribe' },
          run: id,
          points: { type: 'integer', minimum: 2, maximum: 100_000 },
          after: { type: 'number' },
          variables: { type: 'boolean' },
        },
        required: ['v', 'type', 'run'],
        additionalProperties: false,
      },
      {
        type: 'object',
        properties: { v: { const: 1 }, type: { const: 'subscribe-runs' } },
        required: ['v', 'type'],
        additionalProperties: false,
      },
      {
        type: 'object',
        properties: { v: { const: 1 }, type: { const: 'unsubscribe' }, run: id },
        required: ['v', 'type'],
        additionalProperties: false,
      },
    ],
  });
}
