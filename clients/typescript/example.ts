// How a front end uses the generated types (compiled by tests/test_typescript.py with
// `tsc --noEmit --strict`). Copy sluice.d.ts into your project, or regenerate it from a
// running server: npx openapi-typescript http://127.0.0.1:8000/openapi.json -o sluice.d.ts
import type { ChartRequest, ColumnProfile, paths } from "./sluice";

/** The JSON answer of POST /v1/chart, as the OpenAPI document describes it. */
export type ChartAnswer =
  paths["/v1/chart"]["post"]["responses"][200]["content"]["application/json"];

export const request: ChartRequest = {
  source: "deliveries",
  channels: {
    x: { column: "distance_km", bin: { bins: 20 } },
    y: { agg: "count" },
    color: { column: "vehicle", top: 4 },
  },
  where: [
    { column: "delivered_at", gte: "2026-01-01", lt: "2026-04-01" },
    { column: "depot", in: ["North Yard", "Harbour"] },
  ],
  facet: { row: { column: "region" } },
  limit: 5000,
};

export async function chart(base: string, body: ChartRequest): Promise<ChartAnswer> {
  const r = await fetch(`${base}/v1/chart`, {
    method: "POST",
    headers: { "content-type": "application/json" },
    body: JSON.stringify(body),
  });
  if (!r.ok) throw new Error(`${r.status}: ${await r.text()}`);
  return (await r.json()) as ChartAnswer;
}

/** Options of a category picker from a column profile: "value (count)". */
export function pickerOptions(p: ColumnProfile): string[] {
  const values = p.top_values?.values ?? [];
  const shown = values.map((v) => `${String(v.value)} (${v.count})`);
  if (p.top_values && !p.top_values.complete) shown.push(`… ${p.top_values.other_rows} more rows`);
  if (p.null_count > 0) shown.push(`(empty) (${p.null_count})`);
  return shown;
}

export async function profile(base: string, source: string, column: string): Promise<ColumnProfile> {
  const r = await fetch(`${base}/v1/sources/${encodeURIComponent(source)}/columns/${encodeURIComponent(column)}`);
  return (await r.json()) as ColumnProfile;
}
