// keystrata dashboard: what both pages share. Text goes into the page with textContent
// only (never as HTML), so nothing a registry entry holds can become markup or script.

const SVG = "http://www.w3.org/2000/svg";

/** An HTML element with attributes and children (strings become text nodes). */
export function el(tag, attrs = {}, ...children) {
  const node = document.createElement(tag);
  setAttrs(node, attrs);
  for (const child of children.flat()) {
    if (child === null || child === undefined) continue;
    node.append(typeof child === "string" ? document.createTextNode(child) : child);
  }
  return node;
}

/** An SVG element with attributes and children. */
export function svg(tag, attrs = {}, ...children) {
  const node = document.createElementNS(SVG, tag);
  setAttrs(node, attrs);
  for (const child of children.flat()) {
    if (child === null || child === undefined) continue;
    node.append(typeof child === "string" ? document.createTextNode(child) : child);
  }
  return node;
}

function setAttrs(node, attrs) {
  for (const [k, v] of Object.entries(attrs)) {
    if (v === null || v === undefined || v === false) continue;
    node.setAttribute(k, String(v));
  }
}

/** GET a dashboard answer of the node at ``base`` ("" for this node). */
export async function getJson(base, path) {
  // A simple GET with credentials: no custom header, so no CORS preflight (which a
  // browser sends without the client certificate).
  const response = await fetch(base + path, { credentials: "include", cache: "no-store" });
  let body = null;
  try {
    body = await response.json();
  } catch {
    body = null;
  }
  if (!response.ok) {
    const message = body && typeof body.message === "string" ? body.message : "";
    throw new Error(`${response.status} ${message}`.trim());
  }
  return body;
}

// ---------------------------------------------------------------- units

const PREFIXES = [
  [1e12, "T"],
  [1e9, "G"],
  [1e6, "M"],
  [1e3, "k"],
];

function scaled(value, unit) {
  for (const [size, prefix] of PREFIXES) {
    if (Math.abs(value) >= size) return `${(value / size).toPrecision(3)} ${prefix}${unit}`;
  }
  return `${Number.isInteger(value) ? value : value.toPrecision(3)} ${unit}`;
}

/** A figure in the unit of its series, for people. */
export function fmt(value, unit) {
  if (value === null || value === undefined || Number.isNaN(value)) return "–";
  switch (unit) {
    case "bit":
      return scaled(value, "bit");
    case "bit/s":
      return scaled(value, "bit/s");
    case "ratio":
      return `${(100 * value).toFixed(2)} %`;
    case "share":
      return `${(100 * value).toFixed(0)} %`;
    case "keys":
      return Math.round(value).toLocaleString("en-GB");
    case "s":
      return duration(value);
    default:
      return String(value);
  }
}

function duration(seconds) {
  if (seconds < 120) return `${seconds.toFixed(0)} s`;
  if (seconds < 7200) return `${(seconds / 60).toFixed(0)} min`;
  if (seconds < 172800) return `${(seconds / 3600).toFixed(1)} h`;
  return `${(seconds / 86400).toFixed(1)} d`;
}

/** A table cell holding a live figure (``data-live`` marks it for the browser test). */
export function figure(value, unit, name) {
  return el("td", { class: "num", "data-live": name }, fmt(value, unit));
}

export function table(headers, rows, empty) {
  if (!rows.length) return el("p", { class: "empty" }, empty);
  return el(
    "table",
    {},
    el("thead", {}, el("tr", {}, headers.map((h) => el("th", {}, h)))),
    el("tbody", {}, rows),
  );
}

/** Replace the contents of the element with ``id``. */
export function fill(id, ...children) {
  const target = document.getElementById(id);
  target.replaceChildren(...children.flat().filter((c) => c !== null && c !== undefined));
  return target;
}

// ---------------------------------------------------------------- link states

/** The state a link is drawn in: far below plan (the node's readiness note: a whole rate
 * window under half the plan), key flowing, idle (no key over the rate window) or unknown
 * (no node answered for it). */
export function linkState(reading) {
  if (!reading) return "unknown";
  if (reading.far_below) return "low";
  if (reading.rate_bps > 0) return "flowing";
  return "idle";
}

export const STATE_WORDS = {
  flowing: "key flowing",
  low: "far below plan",
  idle: "no key in the rate window",
  unknown: "no answer",
};

// ---------------------------------------------------------------- plots

/**
 * A line plot of time series as an SVG figure.
 * lines: [{label, cls, points: [[unix_seconds, value], ...]}]
 */
export function linePlot({ title, unit, lines, id }) {
  const W = 560;
  const H = 200;
  const left = 78;
  const right = 12;
  const top = 12;
  const bottom = 28;
  const all = lines.flatMap((l) => l.points);
  const plot = svg("svg", { viewBox: `0 0 ${W} ${H}`, class: "plot", role: "img", "aria-label": title });
  const caption = el("figcaption", {}, title);
  const fig = el("figure", { class: "plot-box", "data-plot": id || title }, caption, plot);
  if (!all.length) {
    plot.append(svg("text", { x: W / 2, y: H / 2, class: "plot-empty", "text-anchor": "middle" }, "no samples yet"));
    return fig;
  }
  const t0 = Math.min(...all.map((p) => p[0]));
  const t1 = Math.max(...all.map((p) => p[0]), t0 + 1);
  let v0 = Math.min(0, ...all.map((p) => p[1]));
  let v1 = Math.max(...all.map((p) => p[1]));
  if (v1 <= v0) v1 = v0 + 1;
  const ticks = niceTicks(v0, v1);
  v1 = Math.max(v1, ticks[ticks.length - 1]);
  v0 = Math.min(v0, ticks[0]);
  const x = (t) => left + ((t - t0) / (t1 - t0)) * (W - left - right);
  const y = (v) => top + (1 - (v - v0) / (v1 - v0)) * (H - top - bottom);
  for (const v of ticks) {
    plot.append(svg("line", { x1: left, x2: W - right, y1: y(v), y2: y(v), class: "grid" }));
    plot.append(svg("text", { x: left - 6, y: y(v) + 4, "text-anchor": "end", class: "tick" }, fmt(v, unit)));
  }
  for (const t of timeTicks(t0, t1)) {
    plot.append(svg("line", { x1: x(t), x2: x(t), y1: top, y2: H - bottom, class: "grid" }));
    const anchor = x(t) > W - right - 24 ? "end" : "middle"; // keep the last label inside
    plot.append(svg("text", { x: x(t), y: H - 10, "text-anchor": anchor, class: "tick" }, clock(t)));
  }
  plot.append(svg("rect", { x: left, y: top, width: W - left - right, height: H - top - bottom, class: "frame" }));
  lines.forEach((line, i) => {
    if (!line.points.length) return;
    const d = line.points.map((p) => `${x(p[0]).toFixed(1)},${y(p[1]).toFixed(1)}`).join(" ");
    plot.append(svg("polyline", { points: d, class: `line line-${line.cls || i % 6}` }));
    // The newest sample as a dot, so a series of one sample shows too.
    const [t, v] = line.points[line.points.length - 1];
    plot.append(svg("circle", { cx: x(t), cy: y(v), r: 2.5, class: `dot line-${line.cls || i % 6}` }));
  });
  const legend = el(
    "ul",
    { class: "legend" },
    lines.map((line, i) =>
      el("li", {}, el("span", { class: `swatch line-${line.cls || i % 6}` }), line.label),
    ),
  );
  fig.append(legend);
  return fig;
}

function niceTicks(lo, hi) {
  const span = hi - lo;
  const raw = span / 4;
  const mag = 10 ** Math.floor(Math.log10(raw));
  const step = [1, 2, 2.5, 5, 10].map((m) => m * mag).find((s) => span / s <= 4.5);
  const out = [];
  for (let v = Math.floor(lo / step) * step; v <= hi + step * 0.999; v += step) out.push(v);
  return out;
}

function timeTicks(t0, t1) {
  const span = t1 - t0;
  const steps = [10, 30, 60, 300, 600, 1800, 3600, 7200, 21600, 43200, 86400];
  const step = steps.find((s) => span / s <= 6) || 86400;
  const out = [];
  for (let t = Math.ceil(t0 / step) * step; t <= t1; t += step) out.push(t);
  return out;
}

function clock(t) {
  const d = new Date(t * 1000);
  const two = (n) => String(n).padStart(2, "0");
  return `${two(d.getUTCHours())}:${two(d.getUTCMinutes())}` + (t % 60 ? `:${two(d.getUTCSeconds())}` : "");
}

/** The history of one series at the node at ``base``: {subject: points}. */
export async function historyOf(base, series, sinceSeconds) {
  const since = new Date(Date.now() - sinceSeconds * 1000).toISOString();
  const query = `series=${encodeURIComponent(series)}&since=${encodeURIComponent(since)}&points=400`;
  const answer = await getJson(base, `/api/v1/dashboard/history?${query}`);
  const out = {};
  for (const s of answer.subjects) out[s.subject] = s.points;
  return out;
}

export function stamp(id, text) {
  fill(id, text);
}
