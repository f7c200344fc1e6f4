// sluice preview page. Plain JS, no build step, no network but this server.
// Every drawn mark is one SVG element carrying data-mark (bar | cell | point) and data-row
// (its row in the answer), so a test can count marks against stats.result_rows. A faceted
// answer is drawn as small multiples: one <g class="facet-cell"> per facet value (or pair),
// all with the same scales, each holding the marks of its own rows.
"use strict";

const SVG = "http://www.w3.org/2000/svg";
// The panel being drawn: its size in SVG units (= CSS pixels: the viewBox follows the
// figure's width, so text keeps its CSS size on a phone) and the rows it shows.
let W = 760, H = 380, ROWS = [];
const M = { top: 26, right: 18, bottom: 54, left: 64 };  // left and right: set per drawing
let TITLES = { x: true, y: true };  // axis titles (small multiples: outer panels only)
const PALETTE = ["#2f6f73", "#c7772b", "#5b5ea6", "#8a9a2b", "#b04a6b", "#3b8fc2", "#7a5a3a", "#6c6f75",
                 "#d1a93b", "#4f9a6e"];
const $ = (id) => document.getElementById(id);

const EXAMPLES = {
  "Histogram: distance (bars)": (s) => ({
    source: s,
    channels: { x: { column: "distance_km", bin: { bins: 30, limits: [0, 60] } }, y: { agg: "count" } },
  }),
  "Parcels per week by vehicle (lines)": (s) => ({
    source: s,
    channels: { x: { column: "delivered_at", trunc: "week" }, y: { agg: "count" },
                color: { column: "vehicle", top: 3 } },
    where: [{ column: "delivered_at", gte: "2025-03-01", lt: "2025-09-01" }],
  }),
  "Hour by weekday, local time (heat cells)": (s) => ({
    source: s,
    channels: { x: { column: "delivered_at", extract: "hour", tz: "Europe/Berlin" },
                y: { column: "delivered_at", extract: "isodow", tz: "Europe/Berlin" },
                color: { agg: "count" } },
  }),
  "Distance by weight (binned heat cells)": (s) => ({
    source: s,
    channels: { x: { column: "distance_km", bin: { bins: 20, limits: [0, 40] } },
                y: { column: "weight_kg", bin: { bins: 12, limits: [0, 24] } },
                color: { agg: "count" } },
  }),
  "Mean fee against mean distance per depot and vehicle (points)": (s) => ({
    source: s,
    channels: { x: { agg: "avg", column: "distance_km" }, y: { agg: "avg", column: "fee" },
                color: { column: "vehicle" }, by: [{ column: "depot" }] },
  }),
  "Delay of every June parcel, M4-reduced to 700 px (line)": (s) => ({
    source: s,
    channels: { x: { column: "delivered_at" }, y: { column: "delay_min" } },
    where: [{ column: "delivered_at", gte: "2025-06-01", lt: "2025-07-01" }],
    reduce: { method: "m4", width_px: 700 },
  }),
  "Parcels per depot, stacked by vehicle (bars)": (s) => ({
    source: s,
    channels: { x: { column: "depot" }, y: { agg: "count" }, color: { column: "vehicle" } },
    stack: "sum",
    sort: [{ channel: "x" }],
  }),
};

// ---- small helpers ------------------------------------------------------------------
function el(name, attrs, parent) {
  const n = document.createElementNS(SVG, name);
  for (const [k, v] of Object.entries(attrs || {})) n.setAttribute(k, v);
  if (parent) parent.appendChild(n);
  return n;
}
function html(tag, text, cls) {
  const n = document.createElement(tag);
  if (text !== undefined && text !== null) n.textContent = text;
  if (cls) n.className = cls;
  return n;
}
const numFmt = new Intl.NumberFormat("en", { maximumFractionDigits: 3 });
const compactFmt = new Intl.NumberFormat("en", { notation: "compact", maximumFractionDigits: 2 });
const exactFmt = new Intl.NumberFormat("en", { maximumFractionDigits: 6 });
function fmtNum(v) {   // counts and timings in prose
  if (v === null || v === undefined) return "null";
  if (typeof v !== "number") return String(v);
  return numFmt.format(v);
}
function tickLabels(values) {  // one style per axis: compact only when the axis is large
  const big = Math.max(...values.map((v) => Math.abs(v))) >= 1e5;
  return values.map((v) => (big ? compactFmt.format(v) : numFmt.format(v)));
}
function fmtValue(v, type) {   // table cells and tooltips: full numbers, up to 6 decimals
  if (v === null || v === undefined) return "null";
  if (type === "timestamp" || type === "date") return String(v).replace("T00:00:00Z", "").replace("T", " ");
  if (typeof v === "number") return exactFmt.format(v);
  return String(v);
}
function isTime(type) { return type === "timestamp" || type === "date"; }
function isText(type) { return type === "string" || type === "boolean"; }
function isNum(type) { return type === "integer" || type === "double" || type === "decimal"; }
function toNum(v, type) { return isTime(type) ? Date.parse(v) : Number(v); }

// Heckbert-style nice step for about n ticks over [lo, hi]
function niceStep(lo, hi, n) {
  const span = Math.abs(hi - lo) || 1;
  const raw = span / Math.max(1, n);
  const mag = Math.pow(10, Math.floor(Math.log10(raw)));
  const f = raw / mag;
  return (f < 1.5 ? 1 : f < 3 ? 2 : f < 7 ? 5 : 10) * mag;
}
function niceTicks(lo, hi, n) {
  const step = niceStep(lo, hi, n);
  const out = [];
  for (let v = Math.ceil(lo / step) * step; v <= hi + step * 1e-9; v += step) out.push(Math.abs(v) < step * 1e-9 ? 0 : v);
  return out;
}
const DAY = 86400000;
const TIME_STEPS = [1000, 60000, 3600000, 6 * 3600000, DAY, 7 * DAY, 30.44 * DAY, 91.3 * DAY, 365.25 * DAY];
function timeTicks(lo, hi, n) {
  const want = (hi - lo) / Math.max(1, n);
  const step = TIME_STEPS.find((s) => s >= want) || TIME_STEPS[TIME_STEPS.length - 1];
  const out = [];
  const d = new Date(lo);
  if (step >= 28 * DAY) {               // calendar months / quarters / years, UTC
    const months = step > 300 * DAY ? 12 : step > 80 * DAY ? 3 : 1;
    let t = Date.UTC(d.getUTCFullYear(), d.getUTCMonth(), 1);
    let m = d.getUTCMonth();
    while (t < lo) { m += 1; t = Date.UTC(d.getUTCFullYear(), m, 1); }
    while (m % months) { m += 1; t = Date.UTC(d.getUTCFullYear(), m, 1); }
    for (; t <= hi; m += months, t = Date.UTC(d.getUTCFullYear(), m, 1)) out.push(t);
  } else {
    for (let t = Math.ceil(lo / step) * step; t <= hi; t += step) out.push(t);
  }
  return { ticks: out, step };
}
function timeLabel(t, step) {
  const iso = new Date(t).toISOString();
  if (step >= 300 * DAY) return iso.slice(0, 4);
  if (step >= 28 * DAY) return iso.slice(0, 7);
  if (step >= DAY) return iso.slice(0, 10);
  return iso.slice(5, 16).replace("T", " ");
}

// ---- reading the answer --------------------------------------------------------------
// For each channel: {key, start, end, measure, stackStart, stackEnd} column descriptors.
function channelsOf(resp) {
  const ch = {};
  for (const c of resp.columns) {
    const slot = (ch[c.channel] = ch[c.channel] || {});
    if (c.role === "key") slot.key = slot.key || c;
    else if (c.role === "bin_lo") slot.start = c;
    else if (c.role === "bin_hi") slot.end = c;
    else if (c.role === "measure") slot.measure = slot.measure || c;
    else if (c.role === "stack_base") slot.stackStart = c;
    else if (c.role === "stack_top") slot.stackEnd = c;
  }
  return ch;
}
const isKey = (s) => s && (s.key || s.start);
const isMeasure = (s) => s && s.measure && !s.key && !s.start;

// A positional scale for a key channel: band (categories, small integer keys) or continuous
// (bins, times, other numbers). Returns {kind, pos(row) -> [a, b] in pixels, ticks}.
function keyScale(resp, slot, chName, lo, hi, nullsPlaced) {
  const data = resp.data;
  const keyCol = slot.start || slot.key;
  const band = !slot.start && !isTime(keyCol.type) && !(isNum(keyCol.type) && new Set(data[keyCol.name]).size > 40);
  if (!nullsPlaced && !band && data[keyCol.name].some((v) => v === null)) {
    // a NULL key is its own group: it gets a slot of its own past the end of the axis
    // (its width follows the panel: a small multiple keeps most of its axis for the data)
    const room = Math.min(30, Math.abs(hi - lo) * 0.1);
    const dir = hi > lo ? 1 : -1, slotHi = hi, slotLo = hi - dir * room;
    const sc = keyScale(resp, slot, chName, lo, hi - dir * (room + Math.min(14, room / 2)), true);
    const inner = sc.pos;
    sc.pos = (i) => (data[keyCol.name][i] === null ? [Math.min(slotLo, slotHi), Math.max(slotLo, slotHi)] : inner(i));
    sc.ticks = sc.ticks.concat([{ at: (slotLo + slotHi) / 2, label: "null" }]);
    return sc;
  }
  if (slot.start) {
    const type = slot.start.type;
    const b = (resp.bins || {})[chName] || {};
    const dom = resp.domains[chName] || [b.start, b.stop];
    const d0 = toNum(dom[0], type), d1 = toNum(dom[1], type);
    const f = (v) => lo + ((toNum(v, type) - d0) / ((d1 - d0) || 1)) * (hi - lo);
    const sc = {
      kind: "continuous", type, d0, d1, f, lo, hi,
      pos: (i) => {
        const a = data[slot.start.name][i], z = data[slot.end.name][i];
        return a === null ? null : [f(a), f(z)];
      },
    };
    sc.ticks = continuousTicks(type, d0, d1, f, b, hi - lo);
    return sc;
  }
  const c = slot.key;
  const vals = data[c.name];
  if (isTime(c.type) || (isNum(c.type) && new Set(vals).size > 40)) {
    const dom = resp.domains[c.name] || [vals[0], vals[vals.length - 1]];
    let d0 = toNum(dom[0], c.type), d1 = toNum(dom[1], c.type);
    const pad = (d1 - d0) * 0.02 || 1;
    d0 -= pad; d1 += pad;
    const f = (v) => lo + ((toNum(v, c.type) - d0) / ((d1 - d0) || 1)) * (hi - lo);
    const sc = { kind: "continuous", type: c.type, d0, d1, f, lo, hi, pos: (i) => (vals[i] === null ? null : [f(vals[i]), f(vals[i])]) };
    sc.ticks = continuousTicks(c.type, d0, d1, f, null, hi - lo);
    return sc;
  }
  // band: distinct values, numbers sorted, text in the answer's domain order
  let cats = [];
  if (isNum(c.type)) cats = [...new Set(vals)].sort((a, b) => (a === null) - (b === null) || a - b);
  else {
    const seen = new Set();
    for (const v of (Array.isArray(resp.domains[c.name]) && !isNum(c.type) ? resp.domains[c.name] : []).concat(vals)) {
      if (!seen.has(v)) { seen.add(v); cats.push(v); }
    }
  }
  const bw = (hi - lo) / Math.max(1, cats.length);
  const index = new Map(cats.map((v, k) => [v, k]));
  const sc = {
    kind: "band", cats, bw, lo,
    pos: (i) => { const k = index.get(vals[i]); return [lo + k * bw + bw * 0.1, lo + (k + 1) * bw - bw * 0.1]; },
  };
  const every = Math.ceil(cats.length / Math.max(1, Math.floor((Math.abs(hi - lo)) / (chName === "y" ? 18 : 46))));
  sc.ticks = cats.map((v, k) => ({ at: lo + (k + 0.5) * bw, label: fmtValue(v, c.type), show: k % every === 0 }))
    .filter((t) => t.show);
  return sc;
}
function continuousTicks(type, d0, d1, f, bins, span) {
  const n = Math.max(2, Math.floor(Math.abs(span) / 80));
  if (isTime(type)) {
    const { ticks, step } = timeTicks(d0, d1, n);
    return ticks.map((t) => ({ at: f(new Date(t).toISOString()), label: timeLabel(t, step) }));
  }
  if (bins && bins.count && bins.count <= 12) {   // every bin edge, thinned to ~40 px apart
    const out = [];
    const vals = [];
    for (let k = 0; k <= bins.count; k++) vals.push(bins.start + k * bins.width);
    const labels = tickLabels(vals);
    const raw = 40 / (Math.abs(span) / bins.count);
    const every = [1, 2, 5, 10, 20].find((k) => k >= raw) || bins.count;
    for (let k = 0; k <= bins.count; k += every) out.push({ at: f(vals[k]), label: labels[k] });
    return out;
  }
  const vals = niceTicks(d0, d1, n), labels = tickLabels(vals);
  return vals.map((v, k) => ({ at: f(v), label: labels[k] }));
}
function measureScale(resp, cols, lo, hi, zero) {
  let d0 = zero ? 0 : Infinity, d1 = zero ? 0 : -Infinity;
  for (const c of cols) for (const v of resp.data[c.name]) if (v !== null && Number.isFinite(v)) { d0 = Math.min(d0, v); d1 = Math.max(d1, v); }
  if (!Number.isFinite(d0)) { d0 = 0; d1 = 1; }
  if (d0 === d1) { d1 = d0 + 1; }
  const nonNegative = d0 >= 0;
  if (!zero) { const pad = (d1 - d0) * 0.05; d0 -= pad; d1 += pad; }
  const step = niceStep(d0, d1, 6);
  d1 = Math.ceil(d1 / step) * step;
  if (d0 < 0 || !zero) d0 = Math.floor(d0 / step) * step;
  if (nonNegative && d0 < 0) d0 = 0;  // padding never invents negative values
  const f = (v) => lo + ((v - d0) / (d1 - d0)) * (hi - lo);
  const vals = niceTicks(d0, d1, 6), labels = tickLabels(vals);
  return { f, ticks: vals.map((v, k) => ({ at: f(v), label: labels[k] })) };
}

// ---- drawing -------------------------------------------------------------------------
function axis(svg, ticks, horizontal, at, title) {
  const g = el("g", { class: "axis" }, svg);
  const grid = el("g", { class: "grid" }, svg);
  svg.insertBefore(grid, svg.firstChild);
  if (horizontal) {
    el("line", { x1: M.left, x2: W - M.right, y1: at, y2: at }, g);
    const rotate = ticks.length > 10 && ticks.some((t) => t.label.length > 4);
    for (const t of ticks) {
      el("line", { x1: t.at, x2: t.at, y1: at, y2: at + 4 }, g);
      const tx = el("text", rotate ? { x: t.at, y: at + 8, "text-anchor": "end",
        transform: `rotate(-35 ${t.at} ${at + 8})` } : { x: t.at, y: at + 16, "text-anchor": "middle" }, g);
      tx.textContent = t.label;
    }
    if (title && TITLES.x) { const tt = el("text", { class: "title", x: W - M.right, y: H - 6, "text-anchor": "end" }, svg); tt.textContent = title; }
  } else {
    el("line", { x1: at, x2: at, y1: M.top, y2: H - M.bottom }, g);
    for (const t of ticks) {
      el("line", { x1: at - 4, x2: at, y1: t.at, y2: t.at }, g);
      el("line", { x1: M.left, x2: W - M.right, y1: t.at, y2: t.at }, grid);
      const tx = el("text", { x: at - 7, y: t.at + 4, "text-anchor": "end" }, g);
      tx.textContent = t.label;
    }
    if (title && TITLES.y) { const tt = el("text", { class: "title", x: 4, y: 12 }, svg); tt.textContent = title; }
  }
}
function colorOf(resp, ch) {
  const slot = ch.color;
  if (!slot) return { fill: () => PALETTE[0], legend: [] };
  if (slot.measure && !slot.key && !slot.start) {   // sequential ramp for a measure
    const vals = resp.data[slot.measure.name].filter((v) => v !== null);
    const lo = Math.min(...vals), hi = Math.max(...vals);
    const ramp = (t) => `hsl(184, ${30 + 30 * t}%, ${94 - 62 * t}%)`;
    return {
      fill: (i) => { const v = resp.data[slot.measure.name][i]; return v === null ? "#ddd" : ramp((v - lo) / ((hi - lo) || 1)); },
      legend: [[ramp(0), `${slot.measure.name} ${fmtNum(lo)}`], [ramp(1), fmtNum(hi)]],
    };
  }
  const c = slot.key || slot.start;
  const vals = resp.data[c.name];
  const dom = Array.isArray(resp.domains[c.name]) && !isNum(c.type) && !isTime(c.type) ? resp.domains[c.name] : [...new Set(vals)];
  const idx = new Map(dom.map((v, k) => [v, k]));
  for (const v of vals) if (!idx.has(v)) { idx.set(v, idx.size); dom.push(v); }
  return {
    fill: (i) => PALETTE[idx.get(vals[i]) % PALETTE.length],
    index: (i) => idx.get(vals[i]), count: idx.size, column: c.name,
    legend: dom.map((v, k) => [PALETTE[k % PALETTE.length], fmtValue(v, c.type)]),
  };
}
function tip(node, resp, i) {
  const t = el("title", {}, node);
  t.textContent = resp.columns.map((c) => `${c.name}: ${fmtValue(resp.data[c.name][i], c.type)}`).join("\n");
}

// The value of a facet key in row i, as a label ("North", "0–10").
function facetValue(resp, slot, i) {
  if (!slot) return null;
  if (slot.start) {
    const a = resp.data[slot.start.name][i];
    return a === null ? null : `${fmtValue(a, slot.start.type)}–${fmtValue(resp.data[slot.end.name][i], slot.end.type)}`;
  }
  return slot.key ? resp.data[slot.key.name][i] : null;
}
// Facet values in key order (numbers and times by value, text by code point), NULL last.
function facetOrder(resp, slot, n) {
  const seen = new Map();
  for (let i = 0; i < n; i++) {
    const v = facetValue(resp, slot, i);
    if (!seen.has(v)) seen.set(v, slot.start ? resp.data[slot.start.name][i] : v);
  }
  const type = (slot.start || slot.key).type;
  const cmp = (a, b) => (isTime(type) ? toNum(a, type) - toNum(b, type)
    : isNum(type) || type === "boolean" ? Number(a) - Number(b) : a < b ? -1 : a > b ? 1 : 0);
  return [...seen.entries()].sort((a, b) => (a[1] === null) - (b[1] === null) || (a[1] === null ? 0 : cmp(a[1], b[1])))
    .map((e) => e[0]);
}
// Small multiples: one cell per facet value (row facet: rows of cells, col facet: columns).
function facetGrid(resp, ch, n) {
  if (!ch.row && !ch.col) return null;
  const rv = ch.row ? facetOrder(resp, ch.row, n) : [undefined];
  const cv = ch.col ? facetOrder(resp, ch.col, n) : [undefined];
  const cells = [];
  for (const [r, a] of rv.entries()) for (const [c, b] of cv.entries()) cells.push({ r, c, row: a, col: b, rows: [] });
  const at = new Map(cells.map((cell) => [JSON.stringify([cell.row, cell.col]), cell]));
  for (let i = 0; i < n; i++) {
    const a = ch.row ? facetValue(resp, ch.row, i) : undefined, b = ch.col ? facetValue(resp, ch.col, i) : undefined;
    at.get(JSON.stringify([a, b])).rows.push(i);
  }
  return { cells: cells.filter((c) => c.rows.length), nr: rv.length, nc: cv.length };
}
// "region = North" for one facet, "North · van" for a grid (the legend names the keys).
function facetLabel(ch, cell) {
  const value = (slot, v) => (v === null ? "null" : slot.start ? v : fmtValue(v, (slot.key || slot.start).type));
  const name = (slot) => (slot.key || slot.start).name.replace(/_lo$/, "");
  if (ch.row && ch.col) return `${value(ch.row, cell.row)} · ${value(ch.col, cell.col)}`;
  const slot = ch.row || ch.col, v = ch.row ? cell.row : cell.col;
  return `${name(slot)} = ${value(slot, v)}`;
}
function fitText(node, text, width) {   // cut with an ellipsis to fit; the full text as a tooltip
  node.textContent = text;
  if (node.getComputedTextLength() <= width) return;
  el("title", {}, node.parentNode).textContent = text;
  let k = text.length;
  while (k > 1 && node.getComputedTextLength() > width) node.textContent = text.slice(0, --k) + "…";
}

function draw(resp, body) {
  const svg = $("chart");
  svg.replaceChildren();
  const ch = channelsOf(resp);
  const n = resp.stats ? resp.stats.result_rows : 0;
  const full = Math.max(280, Math.round($("figure").clientWidth - 14));  // SVG units = CSS px
  const narrow = full < 560;
  // room on the left for the y labels: category names can be long
  const yKey = ch.y && ch.y.key;
  const longest = yKey ? Math.max(4, ...resp.data[yKey.name].map((v) => fmtValue(v, yKey.type).length)) : 6;
  M.left = Math.round(Math.min(narrow ? 110 : 180, Math.max(narrow ? 50 : 64, 16 + 6.6 * longest)));
  M.right = narrow ? 10 : 18;
  const color = colorOf(resp, ch);
  const grid = facetGrid(resp, ch, n);
  let kind = "none";
  if (!grid) {
    W = full; H = narrow ? 300 : 380; ROWS = [...Array(n).keys()]; TITLES = { x: true, y: true };
    svg.setAttribute("viewBox", `0 0 ${W} ${H}`);
    svg.setAttribute("width", W); svg.setAttribute("height", H);
    kind = panel(svg, resp, body, ch, color);
  } else {
    const gap = 12, head = 20;
    const cw = Math.floor((full - gap * (grid.nc - 1)) / grid.nc);
    const chh = grid.nr > 1 ? (narrow ? 210 : 240) : (narrow ? 280 : 340);
    const total = grid.nr * (chh + head) + gap * (grid.nr - 1);
    svg.setAttribute("viewBox", `0 0 ${full} ${total}`);
    svg.setAttribute("width", full); svg.setAttribute("height", total);
    for (const cell of grid.cells) {
      const g = el("g", { class: "facet-cell", transform: `translate(${cell.c * (cw + gap)},${cell.r * (chh + head + gap)})`,
        "data-facet-row": ch.row ? String(cell.row) : "", "data-facet-col": ch.col ? String(cell.col) : "",
        "data-rows": cell.rows.length }, svg);
      el("rect", { class: "facet-frame", x: 0.5, y: 0.5, width: cw - 1, height: chh + head - 1 }, g);
      fitText(el("text", { class: "facet-title", x: cw - 8, y: 15, "text-anchor": "end" }, g), facetLabel(ch, cell), cw - 16);
      const inner = el("g", { transform: `translate(0,${head})` }, g);
      W = cw; H = chh; ROWS = cell.rows;
      TITLES = { x: cell.r === grid.nr - 1, y: cell.c === 0 };
      kind = panel(inner, resp, body, ch, color);
    }
  }
  const legend = $("legend");
  legend.replaceChildren();
  if (kind === "none") legend.append(html("span", "No drawing for an answer without a measure; the table below has it."));
  for (const [c, label] of color.legend) { const s = html("span", label); const sw = html("i"); sw.style.background = c; s.prepend(sw); legend.append(s); }
  if (grid) {
    const nm = (slot) => (slot.key || slot.start).name.replace(/_lo$/, "");
    const what = ch.row && ch.col ? `${nm(ch.row)} (rows) × ${nm(ch.col)} (columns)` : nm(ch.row || ch.col);
    legend.append(html("span", `${grid.cells.length} cells by ${what}, the same scales in each.`));
  }
  for (const [chName, count] of Object.entries((resp.stats && resp.stats.outside_limits) || {})) {
    if (count > 0) legend.append(html("span", `${fmtNum(count)} rows outside the ${chName} limits are not drawn.`, "outside"));
  }
  return { kind, marks: svg.querySelectorAll("[data-mark]").length };
}

// One plot panel in `svg` (the figure or a facet cell): W x H units, the rows ROWS, scales
// from the whole answer (so every facet cell shares them).
function panel(svg, resp, body, ch, color) {
  const xr = [M.left, W - M.right], yr = [H - M.bottom, M.top];
  let kind = "none";
  const marks = el("g", { class: "marks" }, svg);

  const hasMeasure = resp.columns.some((c) => c.role === "measure");
  if (ch.x && ch.x.key && ch.y && ch.y.key && !hasMeasure && (resp.reduced || (!isText(ch.x.key.type) && isNum(ch.y.key.type)))) {
    // a raw (or M4-reduced) line: x and y are both plain values, rows come ordered by x
    kind = "point";
    const lin = (c, lo, hi) => {
      const dom = resp.domains[c.name] || [];
      let d0 = toNum(dom[0], c.type), d1 = toNum(dom[1], c.type);
      if (!(d1 > d0)) { d0 -= 1; d1 += 1; }
      const f = (v) => lo + ((toNum(v, c.type) - d0) / (d1 - d0)) * (hi - lo);
      return { f, ticks: continuousTicks(c.type, d0, d1, f, null, hi - lo) };
    };
    const xs = lin(ch.x.key, xr[0], xr[1]), ys = lin(ch.y.key, yr[0], yr[1]);
    const X = resp.data[ch.x.key.name], Y = resp.data[ch.y.key.name];
    const pts = [];
    for (const i of ROWS) {
      if (X[i] === null || Y[i] === null) { tip(nullMark("point", i, M.left, H - M.bottom, marks), resp, i); continue; }
      pts.push([xs.f(X[i]), ys.f(Y[i]), i]);
    }
    if (pts.length > 1) {
      el("path", { "data-series": 0, d: "M" + pts.map((p) => `${p[0].toFixed(1)},${p[1].toFixed(1)}`).join("L"),
        fill: "none", stroke: PALETTE[0], "stroke-width": 1, "stroke-linejoin": "round" }, marks);
    }
    for (const [x, y, i] of pts) tip(el("circle", { "data-mark": "point", "data-row": i, cx: x, cy: y, r: 1.3, fill: PALETTE[0] }, marks), resp, i);
    axis(svg, xs.ticks, true, H - M.bottom, ch.x.key.name);
    axis(svg, ys.ticks, false, M.left, ch.y.key.name + (resp.reduced ? ` (${resp.reduced.method} of ${fmtNum(resp.reduced.input_rows)} rows)` : ""));
  } else if (isKey(ch.x) && isKey(ch.y)) {
    // heat cells: two keys, the colour is the measure
    kind = "cell";
    const xs = keyScale(resp, ch.x, "x", xr[0], xr[1]), ys = keyScale(resp, ch.y, "y", yr[0], yr[1]);
    for (const i of ROWS) {
      const px = cellSpan(xs, i), py = cellSpan(ys, i);
      if (!px || !py) continue;
      tip(el("rect", { "data-mark": "cell", "data-row": i, x: Math.min(...px), y: Math.min(...py),
        width: Math.max(1, Math.abs(px[1] - px[0])), height: Math.max(1, Math.abs(py[1] - py[0])),
        fill: color.fill(i) }, marks), resp, i);
    }
    axis(svg, xs.ticks, true, H - M.bottom, labelOf(ch.x, "x", body));
    axis(svg, ys.ticks, false, M.left, labelOf(ch.y, "y", body));
  } else if (isMeasure(ch.x) && isMeasure(ch.y)) {
    kind = "point";
    const xs = measureScale(resp, [ch.x.measure], xr[0], xr[1], false);
    const ys = measureScale(resp, [ch.y.measure], yr[0], yr[1], false);
    for (const i of ROWS) {
      const vx = resp.data[ch.x.measure.name][i], vy = resp.data[ch.y.measure.name][i];
      if (vx === null || vy === null) {   // a null measure: a hollow mark on the axis
        tip(nullMark("point", i, vx === null ? M.left : xs.f(vx), vy === null ? H - M.bottom : ys.f(vy), marks), resp, i);
        continue;
      }
      tip(el("circle", { "data-mark": "point", "data-row": i, cx: xs.f(vx), cy: ys.f(vy), r: 4,
        fill: color.fill(i), "fill-opacity": 0.8, stroke: "#fff", "stroke-width": 0.8 }, marks), resp, i);
    }
    axis(svg, xs.ticks, true, H - M.bottom, ch.x.measure.name);
    axis(svg, ys.ticks, false, M.left, ch.y.measure.name);
  } else if (isKey(ch.x) && ch.y && ch.y.measure) {
    const keyType = (ch.x.key || ch.x.start).type;
    const stacked = ch.y.stackStart && ch.y.stackEnd;
    const xs = keyScale(resp, ch.x, "x", xr[0], xr[1]);
    const mcols = stacked ? [ch.y.stackStart, ch.y.stackEnd] : [ch.y.measure];
    const ys = measureScale(resp, mcols, yr[0], yr[1], true);
    const yv = (i) => resp.data[ch.y.measure.name][i];
    if (isTime(keyType) && !ch.x.start && !stacked) {
      kind = "point";  // a line through the rows of each colour, one point mark per row
      drawLines(resp, ch, xs, ys, color, marks);
    } else {
      kind = "bar";
      const dodge = !stacked && color.count > 1;
      for (const i of ROWS) {
        let p = xs.pos(i);
        const v = yv(i);
        if (!p) continue;
        if (v === null) { tip(nullMark("bar", i, (p[0] + p[1]) / 2, ys.f(0), marks), resp, i); continue; }
        if (dodge) { const w = (p[1] - p[0]) / color.count; p = [p[0] + w * color.index(i), p[0] + w * (color.index(i) + 1)]; }
        const a = stacked ? resp.data[ch.y.stackStart.name][i] : 0, z = stacked ? resp.data[ch.y.stackEnd.name][i] : v;
        const y0 = ys.f(a), y1 = ys.f(z);
        const gap = xs.kind === "continuous" && !dodge ? 0.5 : 0;
        tip(el("rect", { "data-mark": "bar", "data-row": i, x: Math.min(p[0], p[1]) + gap, y: Math.min(y0, y1),
          width: Math.max(1, Math.abs(p[1] - p[0]) - 2 * gap), height: Math.max(0.5, Math.abs(y1 - y0)),
          fill: color.fill(i) }, marks), resp, i);
      }
    }
    axis(svg, xs.ticks, true, H - M.bottom, labelOf(ch.x, "x", body));
    axis(svg, ys.ticks, false, M.left, ch.y.measure.name + (stacked ? ` (stacked: ${resp.stack || "sum"})` : ""));
  } else if (isKey(ch.y) && ch.x && ch.x.measure) {
    // horizontal bars: the key on y, the measure (maybe stacked) along x
    kind = "bar";
    const stacked = ch.x.stackStart && ch.x.stackEnd;
    let ys = keyScale(resp, ch.y, "y", yr[0], yr[1]);
    if (ys.kind === "band") ys = keyScale(resp, ch.y, "y", yr[1], yr[0]);  // categories read top-down
    const xs = measureScale(resp, stacked ? [ch.x.stackStart, ch.x.stackEnd] : [ch.x.measure], xr[0], xr[1], true);
    const dodge = !stacked && color.count > 1;
    for (const i of ROWS) {
      let p = ys.pos(i);
      const v = resp.data[ch.x.measure.name][i];
      if (!p) continue;
      if (v === null) { tip(nullMark("bar", i, xs.f(0), (p[0] + p[1]) / 2, marks), resp, i); continue; }
      if (dodge) { const w = (p[1] - p[0]) / color.count; p = [p[0] + w * color.index(i), p[0] + w * (color.index(i) + 1)]; }
      const a = stacked ? resp.data[ch.x.stackStart.name][i] : 0, z = stacked ? resp.data[ch.x.stackEnd.name][i] : v;
      const x0 = xs.f(a), x1 = xs.f(z);
      tip(el("rect", { "data-mark": "bar", "data-row": i, x: Math.min(x0, x1), y: Math.min(p[0], p[1]),
        width: Math.max(0.5, Math.abs(x1 - x0)), height: Math.max(1, Math.abs(p[1] - p[0])), fill: color.fill(i) }, marks), resp, i);
    }
    axis(svg, xs.ticks, true, H - M.bottom, ch.x.measure.name);
    axis(svg, ys.ticks, false, M.left, labelOf(ch.y, "y", body));
  } else {
    // any other shape (one channel only, facets without x/y...): one bar per row, in row order
    const m = resp.columns.find((c) => c.role === "measure");
    if (m) {
      kind = "bar";
      const keys = resp.columns.filter((c) => c.role === "key" || c.role === "bin_lo");
      const label = (i) => keys.map((c) => fmtValue(resp.data[c.name][i], c.type)).join(" · ") || `row ${i + 1}`;
      const bw = (xr[1] - xr[0]) / Math.max(1, ROWS.length);
      const ys = measureScale(resp, [m], yr[0], yr[1], true);
      const slot = new Map(ROWS.map((i, k) => [i, k]));
      for (const i of ROWS) {
        const v = resp.data[m.name][i], x = xr[0] + slot.get(i) * bw;
        if (v === null) { tip(nullMark("bar", i, x + bw / 2, ys.f(0), marks), resp, i); continue; }
        const y0 = ys.f(0), y1 = ys.f(v);
        tip(el("rect", { "data-mark": "bar", "data-row": i, x: x + bw * 0.1, y: Math.min(y0, y1), width: Math.max(1, bw * 0.8),
          height: Math.max(0.5, Math.abs(y1 - y0)), fill: color.fill(i) }, marks), resp, i);
      }
      const every = Math.ceil(ROWS.length / Math.max(1, Math.floor((xr[1] - xr[0]) / 60)));
      axis(svg, ROWS.filter((i, k) => k % every === 0).map((i) => ({ at: xr[0] + (slot.get(i) + 0.5) * bw, label: label(i) })),
        true, H - M.bottom, "rows in answer order");
      axis(svg, ys.ticks, false, M.left, m.name);
    }
  }
  return kind;
}
// A row whose measure is null still gets its mark: a small hollow diamond, data-null="true".
function nullMark(kind, i, x, y, parent) {
  return el("path", { "data-mark": kind, "data-row": i, "data-null": "true",
    d: `M${x - 4},${y}L${x},${y - 4}L${x + 4},${y}L${x},${y + 4}Z`, fill: "#fff", stroke: "#8a9098", "stroke-width": 1 }, parent);
}
function cellSpan(sc, i) {
  const p = sc.pos(i);
  if (!p) return null;
  if (sc.kind === "band") { const mid = (p[0] + p[1]) / 2, half = sc.bw / 2; return [mid - half + 0.5, mid + half - 0.5]; }
  return p[0] === p[1] ? [p[0] - 3, p[0] + 3] : p;
}
function labelOf(slot, chName, body) {
  if (slot.key) return slot.key.name;
  // a binned key is named <channel>_lo/_hi; the request says which column it bins
  const spec = body && body.channels && body.channels[chName];
  return spec && spec.column ? `${spec.column} (binned)` : slot.start.name.replace(/_lo$/, "");
}
function drawLines(resp, ch, xs, ys, color, marks) {
  const series = new Map();
  for (const i of ROWS) {
    const k = color.index ? color.index(i) : 0;
    if (!series.has(k)) series.set(k, []);
    series.get(k).push(i);
  }
  const yname = ch.y.measure.name;
  for (const [k, rows] of series) {
    const all = rows.map((i) => ({ i, p: xs.pos(i), v: resp.data[yname][i] })).filter((o) => o.p);
    for (const o of all) if (o.v === null) tip(nullMark("point", o.i, o.p[0], ys.f(0), marks), resp, o.i);
    const pts = all.filter((o) => o.v !== null).sort((a, b) => a.p[0] - b.p[0]);
    const linked = pts.filter((o) => resp.data[(ch.x.key || ch.x.start).name][o.i] !== null);
    if (linked.length > 1) {
      el("path", { "data-series": k, d: "M" + linked.map((o) => `${o.p[0].toFixed(1)},${ys.f(o.v).toFixed(1)}`).join("L"),
        fill: "none", stroke: color.fill(rows[0]), "stroke-width": 1.6 }, marks);
    }
    for (const o of pts) {
      tip(el("circle", { "data-mark": "point", "data-row": o.i, cx: o.p[0], cy: ys.f(o.v), r: 2.2, fill: color.fill(o.i) }, marks), resp, o.i);
    }
  }
}

// Line breaks before the main clauses, outside quoted names and strings (display only).
function layoutSql(sql) {
  const parts = sql.split(/('(?:[^']|'')*'|"(?:[^"]|"")*")/);
  return parts.map((p, k) => (k % 2 ? p : p
    .replace(/\s+(FROM|WHERE|GROUP BY|HAVING|QUALIFY|WINDOW|ORDER BY|LIMIT|UNION ALL|(?:LEFT |INNER |CROSS )?JOIN)\s+/g, "\n$1 ")
    .replace(/\)\s*,\s*$/g, "),\n")
    .replace(/^\s*AS\s*\(\s*SELECT\s+/g, " AS (\n  SELECT ")
    .replace(/\)\s+SELECT\s+/g, ")\nSELECT ")))
    .join("");
}

// ---- page ------------------------------------------------------------------------------
function headers(extra) {
  const key = $("apikey").value.trim();
  return Object.assign(key ? { "X-API-Key": key } : {}, extra || {});
}
function askForKey(status) {
  if (status === 401) { $("key-box").open = true; $("apikey").focus(); }
}
function showTable(resp) {
  const t = $("result");
  t.replaceChildren();
  const head = html("tr");
  for (const c of resp.columns) { const th = html("th", c.name); th.append(html("small", `${c.role} · ${c.type}`)); head.append(th); }
  t.append(head);
  const n = resp.stats.result_rows, shown = Math.min(n, 500);
  for (let i = 0; i < shown; i++) {
    const tr = html("tr");
    for (const c of resp.columns) tr.append(html("td", fmtValue(resp.data[c.name][i], c.type), isNum(c.type) ? "num" : ""));
    t.append(tr);
  }
  if (shown < n) { const tr = html("tr"); const td = html("td", `… ${n - shown} more rows not shown`); td.colSpan = resp.columns.length; tr.append(td); t.append(tr); }
}
function valueAt(body, ptr) {
  if (!ptr) return undefined;
  let node = body;
  for (const raw of ptr.split("/").slice(1)) {
    const part = raw.replace(/~1/g, "/").replace(/~0/g, "~");
    if (node === null || typeof node !== "object" || !(part in node)) return undefined;
    node = node[part];
  }
  return node;
}
function showProblem(p, body) {
  const box = $("problem");
  box.replaceChildren();
  box.hidden = false;
  $("figure").hidden = true;
  box.append(html("h3", `${p.title || "Error"} (${p.status || "?"})`));
  const items = (p.errors && p.errors.length ? p.errors : p.pointer !== undefined ? [{ pointer: p.pointer, detail: p.detail }] : []);
  if (!(items.length === 1 && items[0].detail === p.detail)) box.append(html("div", p.detail || ""));
  if (items.length) {
    const ul = html("ul");
    for (const e of items) {
      const li = html("li");
      li.append("at ", Object.assign(html("code", e.pointer || "/"), { className: "pointer" }), ` — ${e.detail}`);
      const v = valueAt(body, e.pointer);
      if (v !== undefined && typeof v !== "object") li.append(html("span", ` (the request has ${JSON.stringify(v)} there)`, "muted"));
      ul.append(li);
    }
    box.append(ul);
  }
  if (p.suggestions && p.suggestions.length) box.append(html("div", `Nearest valid names: ${p.suggestions.join(", ")}`));
}
function clearAnswer() {
  LAST = null;
  $("problem").hidden = true;
  $("figure").hidden = false;
  $("chart").replaceChildren();
  $("legend").replaceChildren();
  $("sql").textContent = "";
  $("result").replaceChildren();
}

// One line about the answer (announced by the live region): rows, what could mislead
// (truncation, approximation, rows outside limits) and where the time went.
function summary(data, drawn, roundTrip) {
  const s = data.stats, tm = data.timing_ms || {};
  const outside = Object.entries(s.outside_limits || {})
    .map(([chName, k]) => ` · ${fmtNum(k)} rows outside the ${chName} limits`).join("");
  const time = data.cache === "hit" ? `cached answer (lookup ${fmtNum(tm.lookup)} ms)`
    : `engine ${fmtNum(tm.execute)} ms`;
  return `${fmtNum(s.result_rows)} rows from ${fmtNum(s.matched_rows)} matched of ${fmtNum(s.source_rows)}`
    + (s.truncated ? ` (truncated: ${fmtNum(s.groups)} groups)` : "") + (data.approximate ? " · approximate" : "")
    + outside
    + ` · ${fmtNum(drawn.marks)} ${drawn.kind === "none" ? "marks" : drawn.kind + " marks"}`
    + ` · ${time} · round trip ${fmtNum(roundTrip)} ms`;
}
let LAST = null;  // the last answer drawn, redrawn when the page width changes

async function run() {
  const btn = $("run");
  let body;
  try { body = JSON.parse($("request").value); } catch (e) {
    clearAnswer();
    showProblem({ title: "Not valid JSON", status: "-", detail: String(e.message) }, null);
    $("status").textContent = "The request is not valid JSON.";
    return;
  }
  btn.disabled = true;
  $("status").textContent = "Running…";
  const t0 = performance.now();
  try {
    const r = await fetch("/v1/chart", { method: "POST", headers: headers({ "Content-Type": "application/json", Accept: "application/json" }),
      body: JSON.stringify(body) });
    const data = await r.json().catch(() => ({ title: "Unreadable answer", status: r.status, detail: r.statusText }));
    clearAnswer();
    if (!r.ok) {
      askForKey(r.status);
      showProblem(data, body);
      // the status line is the page's live region: the problem is announced there too
      $("status").textContent = `Error ${r.status}: ${data.title || "request refused"}`
        + (data.pointer ? ` at ${data.pointer}` : "") + (data.detail ? ` · ${data.detail}` : "")
        + ` · request id ${r.headers.get("x-request-id") || "?"}`;
      document.body.dataset.state = "problem";
      return;
    }
    $("sql").textContent = (data.sql || []).map((s) => layoutSql(s.replace(/;?\s*$/, ";"))).join("\n\n");
    showTable(data);
    LAST = { data, body };
    const drawn = draw(data, body);
    $("status").textContent = summary(data, drawn, performance.now() - t0);
    $("chart").dataset.resultRows = data.stats.result_rows;
    document.body.dataset.state = "done";
  } catch (e) {
    clearAnswer();
    showProblem({ title: "Request failed", status: "-", detail: String(e) }, body);
    document.body.dataset.state = "problem";
  } finally {
    btn.disabled = false;
  }
}

async function loadSource(name) {
  const info = $("source-info"), list = $("columns");
  list.replaceChildren();
  info.textContent = "";
  const r = await fetch(`/v1/sources/${encodeURIComponent(name)}`, { headers: headers() });
  const s = await r.json();
  if (!r.ok) { askForKey(r.status); info.textContent = s.detail || `HTTP ${r.status}`; return; }
  info.textContent = `${s.engine} · table ${s.table} · ${fmtNum(s.row_count)} rows`;
  for (const c of s.columns) {   // buttons: reachable with Tab, Enter / Space insert the name
    const li = html("li");
    const b = html("button", c.name, "column");
    b.type = "button";
    b.dataset.column = c.name;
    b.title = `${c.type}: insert "${c.name}" into the request`;
    b.append(html("span", c.kind || c.type));
    b.addEventListener("click", () => insertAtCursor(JSON.stringify(c.name)));
    li.append(b);
    list.append(li);
  }
  try {   // keep the request on the chosen source
    const body = JSON.parse($("request").value);
    if (body.source !== name) { body.source = name; $("request").value = pretty(body); }
  } catch (_) { /* leave a half-typed request alone */ }
}
function insertAtCursor(text) {
  const ta = $("request");
  const a = ta.selectionStart, z = ta.selectionEnd;
  ta.value = ta.value.slice(0, a) + text + ta.value.slice(z);
  ta.selectionStart = ta.selectionEnd = a + text.length;
  ta.focus();
}
// two-space JSON with short arrays of plain values kept on one line
function pretty(obj) {
  return JSON.stringify(obj, null, 2).replace(/\[\s+([^\[\]{}]*?)\s+\]/g,
    (m, inner) => (inner.length < 60 ? `[${inner.split(/,\s+/).join(", ")}]` : m));
}
function setExample(label) {
  const src = $("source").value || "deliveries";
  $("request").value = pretty(EXAMPLES[label](src));
}

async function init() {
  const ex = $("examples");
  for (const label of Object.keys(EXAMPLES)) ex.append(new Option(label, label));
  ex.addEventListener("change", () => setExample(ex.value));
  setExample(Object.keys(EXAMPLES)[0]);
  $("run").addEventListener("click", run);
  $("request").addEventListener("keydown", (e) => { if (e.key === "Enter" && (e.ctrlKey || e.metaKey)) { e.preventDefault(); run(); } });
  const sel = $("source");
  sel.addEventListener("change", () => loadSource(sel.value));
  const keyInput = $("apikey");
  keyInput.value = sessionStorage.getItem("sluice-api-key") || "";
  keyInput.addEventListener("change", () => { sessionStorage.setItem("sluice-api-key", keyInput.value.trim()); loadSources(); });
  let pending = 0;
  window.addEventListener("resize", () => {
    clearTimeout(pending);
    pending = setTimeout(() => { if (LAST) draw(LAST.data, LAST.body); }, 120);
  });
  await loadSources();
  document.body.dataset.state = "ready";
}
async function loadSources() {
  const sel = $("source");
  const previous = sel.value;
  sel.replaceChildren();
  try {
    const r = await fetch("/v1/sources", { headers: headers() });
    const answer = await r.json();
    if (!r.ok) { askForKey(r.status); $("source-info").textContent = answer.detail || `HTTP ${r.status}`; return; }
    const { sources } = answer;
    for (const s of sources) sel.append(new Option(`${s.name} (${s.engine})`, s.name));
    const pick = sources.find((s) => s.name === previous) || sources.find((s) => s.name === "deliveries") || sources[0];
    if (pick) { sel.value = pick.name; await loadSource(pick.name); }
  } catch (e) {
    $("source-info").textContent = `Cannot list sources: ${e}`;
  }
}
init();
