// Decode an Arrow IPC stream (a sluice answer) with the JavaScript Arrow library, the way a
// browser client would, and print what a client sees as JSON on stdout:
//   node decode_arrow.mjs ANSWER.arrows
// Per field: the Arrow type as the library reads it, and the field metadata. Per column: the
// values as a client gets them -- integers as JS numbers (or BigInt, printed as {"bigint": "..."}),
// decimals as their exact text (unscaled 128-bit integer + scale, no float on the way),
// timestamps as epoch milliseconds plus the wall clock in the zone of their Arrow type
// (Intl.DateTimeFormat, the ICU zone data Node ships), and whether Math.max(...) works on
// the column's values (it throws a TypeError on BigInt).
import { readFileSync } from "node:fs";
import { tableFromIPC, Type } from "apache-arrow";

const table = tableFromIPC(readFileSync(process.argv[2]));

function decimalText(words, scale) {
  // words: little-endian uint32 words of a two's-complement integer
  let v = 0n;
  for (let i = words.length - 1; i >= 0; i--) v = (v << 32n) | BigInt(words[i] >>> 0);
  const bits = BigInt(words.length * 32);
  if (v >> (bits - 1n)) v -= 1n << bits;
  const neg = v < 0n;
  let digits = (neg ? -v : v).toString();
  if (scale > 0) {
    digits = digits.padStart(scale + 1, "0");
    digits = digits.slice(0, -scale) + "." + digits.slice(-scale);
  }
  return (neg ? "-" : "") + digits;
}

function wallClock(ms, zone) {
  const parts = new Intl.DateTimeFormat("en-CA", {
    timeZone: zone || "UTC", year: "numeric", month: "2-digit", day: "2-digit",
    hour: "2-digit", minute: "2-digit", second: "2-digit", hourCycle: "h23",
  }).formatToParts(new Date(ms));
  const p = Object.fromEntries(parts.map((x) => [x.type, x.value]));
  return `${p.year}-${p.month}-${p.day} ${p.hour}:${p.minute}:${p.second}`;
}

const out = { fields: [], columns: {}, math_max: {} };
for (const f of table.schema.fields) {
  const t = f.type;
  out.fields.push({
    name: f.name, type: String(t), typeId: t.typeId, isSigned: t.isSigned ?? null,
    bitWidth: t.bitWidth ?? null, precision: t.precision ?? null, scale: t.scale ?? null,
    timezone: t.timezone ?? null, metadata: Object.fromEntries(f.metadata),
  });
  const col = table.getChild(f.name);
  const values = [];
  for (let i = 0; i < col.length; i++) {
    const v = col.get(i);
    if (v === null || v === undefined) values.push(null);
    else if (t.typeId === Type.Decimal) values.push(decimalText(v, t.scale));
    else if (t.typeId === Type.Timestamp) values.push({ ms: Number(v), wall: wallClock(Number(v), t.timezone) });
    else if (typeof v === "bigint") values.push({ bigint: v.toString() });
    else values.push(v);
  }
  out.columns[f.name] = values;
  if (t.typeId === Type.Int) {
    try {
      out.math_max[f.name] = Math.max(...col.toArray());
    } catch (e) {
      out.math_max[f.name] = e.constructor.name;
    }
  }
}
out.metadata = JSON.parse(table.schema.metadata.get("sluice") || "null");
process.stdout.write(JSON.stringify(out));
