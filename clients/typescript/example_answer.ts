// Reading a chart answer's fields (compiled by tests/test_typescript.py once the OpenAPI
// document describes the 200 answer of POST /v1/chart).
import type { ChartAnswer } from "./example";

export function describe(answer: ChartAnswer): string {
  const names: string[] = answer.columns.map((c) => `${c.name}:${c.role}`);
  const rows: number = answer.stats.result_rows;
  const matched: number = answer.stats.matched_rows;
  return `${names.join(", ")}: ${rows} rows of ${matched} matched${answer.stats.truncated ? " (truncated)" : ""}`;
}
