// sluice preview page, linked charts: four charts of the deliveries source answered by one
// POST /v1/batch per change. A chart's brush (a range dragged on a binned or time axis, or a
// set of clicked categories) filters every other chart; the server applies it (README
// "Linked charts"), this page only draws. Uses the drawing helpers of preview.js (same
// globals: panel, keyScale, channelsOf, colorOf, W, H, ROWS, M, TITLES), so every mark is one
// SVG element with data-mark and data-row, plus data-key / data-value here (the row's x key
// and measure, as the answer has them), for tests to compare with the answer.
"use strict";

const DASH_CHARTS = [
  { id: "distance", title: "Parcels by distance (km, 5 km bins)", brush: "range",
    channels: { x: { column: "distance_km", bin: { width: 5, origin: 0, limits: [0, 40] } }, y: { agg: "count" } } },
  { id: "weekly", title: "Parcels per week", brush: "range",
    channels: { x: { column: "delivered_at", trunc: "week" }, y: { agg: "count" } } },
  { id: "vehicles", title: "Parcels by vehicle", brush: "set",
    channels: { x: { column: "vehicle" }, y: { agg: "count" } } },
  { id: "regions", title: "Parcels by region", brush: "set",
    channels: { x: { column: "region" }, y: { agg: "count" } } },
];
const DASH_H = 250;
// one session per page: a newer batch of this page stops the statements of an older one
const DASH_SESSION = "preview-" + Math.random().toString(36).slice(2, 12);
// sent / superseded: batches sent and 409 superseded answers ignored (for the curious and tests)
const DASH = { cards: new Map(), seq: 0, built: false, lastRequest: null, lastAnswer: null, sent: 0, superseded: 0 };

function dashSource() { return ($("source") && $("source").value) || "deliveries"; }

function dashBuild() {
  const grid = $("dash-grid");
  grid.replaceChildren();
  for (const spec of DASH_CHARTS) {
    const fig = html("figure", null, "dash-card");
    fig.dataset.chart = spec.id;
    const head = html("div", null, "head");
    head.append(html("h3", spec.title));
    const clear = html("button", "Clear", "clear");
    clear.type = "button";
    clear.disabled = true;
    clear.setAttribute("aria-label", `clear the selection on ${spec.title}`);
    head.append(clear);
    const svg = el("svg", { role: "img", tabindex: 0, "aria-label": `${spec.title}; ` +
      (spec.brush === "range" ? "arrow keys select a range" : "arrow keys move, Enter picks a category") }, null);
    const plot = el("g", { class: "plot" }, svg);
    const layer = el("g", { class: "brush-layer" }, svg);
    const sel = html("div", "All rows.", "selection");
    fig.append(head, svg, sel);
    grid.append(fig);
    const card = { spec, fig, svg, plot, layer, sel, clear, resp: null, scale: null,
                   range: null, set: new Set(), cursor: 0, width: 600 };
    DASH.cards.set(spec.id, card);
    clear.addEventListener("click", () => { card.range = null; card.set.clear(); dashChanged(card); });
    if (spec.brush === "range") dashRangeEvents(card);
    else svg.addEventListener("click", (e) => {
      const k = dashBandAt(card, dashPoint(card, e).x);
      if (k !== null) { card.cursor = k; dashToggle(card, card.scale.cats[k]); }
    });
    svg.addEventListener("keydown", (e) => dashKey(card, e));
    svg.addEventListener("focus", () => dashDrawBrush(card));
    svg.addEventListener("blur", () => dashDrawBrush(card));
  }
  DASH.built = true;
}

// pointer position in SVG units (the viewBox follows the card's width)
function dashPoint(card, e) {
  const p = card.svg.createSVGPoint();
  p.x = e.clientX; p.y = e.clientY;
  return p.matrixTransform(card.svg.getScreenCTM().inverse());
}
function dashBandAt(card, x) {
  const sc = card.scale;
  if (!sc || sc.kind !== "band") return null;
  const k = Math.floor((x - sc.lo) / sc.bw);
  return k >= 0 && k < sc.cats.length ? k : null;
}
function dashToggle(card, value) {
  if (card.set.has(value)) card.set.delete(value); else card.set.add(value);
  dashChanged(card);
}

// A dragged span of pixels -> [lo, hi) on the key column, snapped outward to bin edges
// (binned axis) or whole UTC days (time axis), so the brush selects whole marks.
function dashValueAt(card, x) {
  const sc = card.scale;
  const t = (x - sc.lo) / ((sc.hi - sc.lo) || 1);
  return sc.d0 + Math.min(1, Math.max(0, t)) * (sc.d1 - sc.d0);
}
function dashSnap(card, a, b) {
  let lo = Math.min(a, b), hi = Math.max(a, b);
  const bins = (card.resp.bins || {}).x;
  if (bins && bins.width) {
    const top = bins.start + bins.count * bins.width;
    lo = bins.start + Math.floor((lo - bins.start) / bins.width) * bins.width;
    hi = bins.start + Math.ceil((hi - bins.start) / bins.width) * bins.width;
    if (hi <= lo) hi = lo + bins.width;
    return [Math.max(bins.start, lo), Math.min(top, hi)];
  }
  lo = Math.floor(lo / DAY) * DAY;
  hi = Math.ceil(hi / DAY) * DAY;
  if (hi <= lo) hi = lo + DAY;
  return [lo, hi];
}
function dashIsTime(card) { return isTime(card.scale.type); }
function dashLiteral(card, v) {   // the brush bound as the request writes it
  return dashIsTime(card) ? new Date(v).toISOString().slice(0, 10) : Number(v.toFixed(9));
}

function dashRangeEvents(card) {
  let start = null, frame = 0;
  const svg = card.svg;
  svg.addEventListener("pointerdown", (e) => {
    if (!card.scale || card.scale.kind !== "continuous" || e.button !== 0) return;
    const x = dashPoint(card, e).x;
    if (x < card.scale.lo - 2 || x > card.scale.hi + 2) return;
    start = dashValueAt(card, x);
    svg.setPointerCapture(e.pointerId);
    e.preventDefault();
  });
  svg.addEventListener("pointermove", (e) => {
    if (start === null) return;
    card.range = dashSnap(card, start, dashValueAt(card, dashPoint(card, e).x));
    dashDrawBrush(card);
    // live: at most one batch per animation frame; the session stops the superseded ones
    if (!frame) frame = requestAnimationFrame(() => { frame = 0; if (start !== null) dashChanged(card); });
  });
  const end = (e) => {
    if (start === null) return;
    const v = dashValueAt(card, dashPoint(card, e).x);
    card.range = dashSnap(card, start, v);
    start = null;
    if (svg.hasPointerCapture(e.pointerId)) svg.releasePointerCapture(e.pointerId);
    dashChanged(card);
  };
  svg.addEventListener("pointerup", end);
  svg.addEventListener("pointercancel", end);
}

// Keyboard: a range moves by one step (a bin, a week) with the arrows, Shift widens it;
// categories: the arrows move a cursor, Enter / Space picks, Escape clears either.
function dashKey(card, e) {
  if (!card.resp || !card.scale) return;
  if (e.key === "Escape" || e.key === "Delete" || e.key === "Backspace") {
    if (card.range || card.set.size) { card.range = null; card.set.clear(); dashChanged(card); }
    e.preventDefault();
    return;
  }
  if (card.spec.brush === "set") {
    const n = card.scale.cats.length;
    if (e.key === "ArrowRight" || e.key === "ArrowLeft") {
      card.cursor = (card.cursor + (e.key === "ArrowRight" ? 1 : n - 1)) % n;
      dashDrawBrush(card);
      card.sel.textContent = `At ${fmtValue(card.scale.cats[card.cursor], "string")}. ` + dashSelectionText(card);
      e.preventDefault();
    } else if (e.key === "Enter" || e.key === " ") {
      dashToggle(card, card.scale.cats[card.cursor]);
      e.preventDefault();
    }
    return;
  }
  if (e.key !== "ArrowRight" && e.key !== "ArrowLeft") return;
  const bins = (card.resp.bins || {}).x;
  const step = bins && bins.width ? bins.width : 7 * DAY;
  // the first bin, or the first week drawn (its key is the week's start)
  const keys = (card.resp.data[card.spec.channels.x.column] || []).filter((v) => v !== null).map((v) => toNum(v, card.scale.type));
  const first = bins && bins.width ? bins.start : Math.floor(Math.min(...keys) / DAY) * DAY;
  const dir = e.key === "ArrowRight" ? 1 : -1;
  let [lo, hi] = card.range || [first, first + step];
  if (card.range) {
    if (e.shiftKey) hi = Math.max(lo + step, hi + dir * step);
    else { lo += dir * step; hi += dir * step; }
  }
  card.range = [lo, hi];
  dashDrawBrush(card);
  dashChanged(card);
  e.preventDefault();
}

function dashSelectionText(card) {
  const col = card.spec.channels.x.column;
  if (card.range) {
    const [a, b] = card.range.map((v) => (dashIsTime(card) ? new Date(v).toISOString().slice(0, 10) : fmtNum(v)));
    return `Selected ${col} from ${a} up to ${b}; the other charts show only these rows.`;
  }
  if (card.set.size) return `Selected ${col} in ${[...card.set].join(", ")}; the other charts show only these rows.`;
  return "All rows.";
}
function dashBrush(card) {   // the chart's brush in the where vocabulary, or undefined
  const column = card.spec.channels.x.column;
  if (card.range) return [{ column, gte: dashLiteral(card, card.range[0]), lt: dashLiteral(card, card.range[1]) }];
  if (card.set.size) return [{ column, in: [...card.set] }];
  return undefined;
}
function dashRequest() {
  return {
    source: dashSource(), session: DASH_SESSION,
    charts: DASH_CHARTS.map((spec) => {
      const brush = dashBrush(DASH.cards.get(spec.id));
      return Object.assign({ id: spec.id, channels: spec.channels }, brush ? { brush } : {});
    }),
  };
}
function dashChanged(card) {
  card.clear.disabled = !(card.range || card.set.size);
  card.sel.textContent = dashSelectionText(card);
  dashDrawBrush(card);
  dashRun();
}

async function dashRun() {
  const my = ++DASH.seq;
  DASH.sent += 1;
  const body = dashRequest();
  const box = $("dashboard");
  box.dataset.state = "running";
  const t0 = performance.now();
  let r, data;
  try {
    r = await fetch("/v1/batch", { method: "POST", headers: headers({ "Content-Type": "application/json", Accept: "application/json" }),
      body: JSON.stringify(body) });
    data = await r.json().catch(() => ({ title: "Unreadable answer", status: r.status, detail: r.statusText }));
  } catch (e) {
    if (my !== DASH.seq) return;
    data = { title: "Request failed", status: "-", detail: String(e) };
  }
  // superseded by a later-arriving request of this session: quiet, that one answers -- unless
  // this is the newest batch and an older one overtook it on another connection: ask again
  if (r && r.status === 409 && String(data.type || "").endsWith("superseded")) {
    DASH.superseded += 1;
    if (my === DASH.seq) dashRun();
    return;
  }
  if (my !== DASH.seq) return;   // a newer batch is on its way: this answer is not drawn
  const prob = $("dash-problem");
  if (!r || !r.ok) {
    if (r) askForKey(r.status);
    prob.hidden = false;
    prob.textContent = `Error ${r ? r.status : "-"}: ${data.title || "request refused"}${data.detail ? " · " + data.detail : ""}`;
    $("dash-status").textContent = prob.textContent;
    box.dataset.state = "problem";
    return;
  }
  prob.hidden = true;
  DASH.lastRequest = body;
  DASH.lastAnswer = data;
  const parts = [];
  for (const res of data.results) {
    const card = DASH.cards.get(res.id);
    if (!card) continue;
    if (!res.columns) {   // this chart's own problem; the others still draw
      card.plot.replaceChildren();
      card.sel.textContent = `Error ${res.status}: ${res.title} · ${res.detail || ""}`;
      continue;
    }
    dashDraw(card, res);
    parts.push(`${res.id} ${fmtNum(res.stats.matched_rows)} rows` + (res.brushes.length ? ` (filtered by ${res.brushes.join(", ")})` : ""));
  }
  $("dash-status").textContent = `${parts.join(" · ")} · round trip ${fmtNum(performance.now() - t0)} ms`;
  box.dataset.seq = String(my);
  box.dataset.state = "done";
}

function dashDraw(card, resp) {
  card.resp = resp;
  const width = Math.max(300, Math.round(card.fig.clientWidth || 600));
  card.width = width;
  const svg = card.svg, plot = card.plot;
  plot.replaceChildren();
  svg.setAttribute("viewBox", `0 0 ${width} ${DASH_H}`);
  svg.setAttribute("width", width); svg.setAttribute("height", DASH_H);
  const ch = channelsOf(resp);
  W = width; H = DASH_H; ROWS = [...Array(resp.stats.result_rows).keys()]; TITLES = { x: true, y: true };
  M.left = 64; M.right = 18;
  panel(plot, resp, { channels: card.spec.channels }, ch, colorOf(resp, ch));
  const key = (ch.x.start || ch.x.key).name, measure = ch.y.measure.name;
  for (const m of plot.querySelectorAll("[data-mark]")) {
    const i = Number(m.dataset.row);
    m.dataset.key = String(resp.data[key][i]);
    m.dataset.value = String(resp.data[measure][i]);
  }
  card.scale = keyScale(resp, ch.x, "x", M.left, W - M.right);
  dashDrawBrush(card);
}

// The brushing chart shows its selection: a band over the range, or the picked bars at full
// strength and the others faded; plus the keyboard cursor on a category chart.
function dashDrawBrush(card) {
  const layer = card.layer, sc = card.scale;
  layer.replaceChildren();
  if (!sc) return;
  const top = M.top, bottom = DASH_H - M.bottom;
  if (card.spec.brush === "range" && sc.kind === "continuous") {
    if (card.range) {
      const px = (v) => sc.lo + ((v - sc.d0) / ((sc.d1 - sc.d0) || 1)) * (sc.hi - sc.lo);
      const a = px(card.range[0]), b = px(card.range[1]);
      el("rect", { class: "brush", x: Math.min(a, b), y: top, width: Math.max(1, Math.abs(b - a)), height: bottom - top,
        "data-lo": String(card.range[0]), "data-hi": String(card.range[1]) }, layer);
    }
    el("rect", { class: "overlay", x: sc.lo, y: top, width: sc.hi - sc.lo, height: bottom - top }, layer);
    return;
  }
  if (sc.kind === "band") {
    for (const m of card.plot.querySelectorAll("[data-mark]")) {
      if (card.set.size) m.dataset.picked = String(card.set.has(m.dataset.key));
      else delete m.dataset.picked;
    }
    if (document.activeElement === card.svg) {
      el("rect", { class: "cursor", x: sc.lo + card.cursor * sc.bw + 1, y: top, width: sc.bw - 2, height: bottom - top }, layer);
    }
  }
}

function dashShow(on) {
  $("single").hidden = on;
  $("dashboard").hidden = !on;
  $("mode").setAttribute("aria-pressed", String(on));
  $("mode").textContent = on ? "Show the single chart" : "Show linked charts";
  if (on) {
    if (!DASH.built) dashBuild();
    dashRun();
  }
}
$("mode").addEventListener("click", () => dashShow($("dashboard").hidden));
window.addEventListener("resize", () => {
  if ($("dashboard").hidden) return;
  for (const card of DASH.cards.values()) if (card.resp) dashDraw(card, card.resp);
});
