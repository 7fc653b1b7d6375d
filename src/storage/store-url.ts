/** Addresses that name a database server rather than a file: postgres:// and postgresql://. */
export function isPostgresUrl(s: string): boolean {
  return /^postgres(ql)?:\/\//i.test(s);
}
