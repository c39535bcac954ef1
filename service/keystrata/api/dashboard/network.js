// keystrata dashboard: the network page. It reads the network this node's registry holds
// (/api/v1/dashboard/network), then asks every node with a URL for its overview and
// history directly, over that node's own mutual TLS with the operator's certificate; each
// node checks the certificate itself and answers this page's origin only if this node is
// in its registry.

import {
  STATE_WORDS,
  el,
  figure,
  fill,
  fmt,
  getJson,
  historyOf,
  linePlot,
  linkState,
  svg,
  table,
} from "./common.js";

const LIVE_SECONDS = 5;
const HISTORY_SPAN = 3600;
const KM_PER_DEG = 111.195; // mean Earth radius 6371.0 km (common practice)

let network = null;
const answers = {}; // node id -> {overview} or {error}
let lastHistory = 0;

function base(node) {
  return node.self ? "" : node.origin;
}

async function refresh() {
  if (network === null) {
    network = await getJson("", "/api/v1/dashboard/network");
    document.title = `keystrata network seen from ${network.node_id}`;
    fill("title", `Network seen from ${network.node_id}`);
  }
  await Promise.all(
    network.nodes.map(async (node) => {
      if (!node.self && !node.origin) {
        answers[node.id] = { error: "no URL in this node's registry" };
        return;
      }
      try {
        answers[node.id] = { overview: await getJson(base(node), "/api/v1/dashboard/overview") };
      } catch (err) {
        answers[node.id] = { error: `cannot be read (${err.message || "no answer"})` };
      }
    }),
  );
  render();
  fill("updated", `updated ${new Date().toISOString().slice(11, 19)} UTC`);
  const sample = Math.max(...Object.values(answers).map((a) => a.overview?.sample_seconds || 30));
  if (Date.now() / 1000 - lastHistory >= Math.max(sample, 10)) {
    lastHistory = Date.now() / 1000;
    await plots();
  }
}

function overviewOf(id) {
  return answers[id]?.overview || null;
}

function linkReading(link, at) {
  const o = overviewOf(at);
  return o ? o.links.find((l) => l.link_id === link.id) || null : null;
}

function pairReading(pair, at) {
  const o = overviewOf(at);
  return o ? o.pairs.find((p) => p.pair_id === pair.id) || null : null;
}

function render() {
  renderMap();
  renderNodes();
  renderAlerts();
  renderLinks();
  renderPairs();
  renderDeliveries();
}

// ---------------------------------------------------------------- map

function renderMap() {
  const W = 640;
  const H = 420;
  const pad = 60;
  const placed = network.nodes.filter((n) => n.position);
  const map = svg("svg", { id: "map", viewBox: `0 0 ${W} ${H}`, role: "img", "aria-label": "map of the network" });
  map.append(svg("rect", { x: 0, y: 0, width: W, height: H, class: "map-ground" }));
  if (!placed.length) {
    map.append(svg("text", { x: W / 2, y: H / 2, "text-anchor": "middle", class: "plot-empty" }, "no positions in the registry"));
    fill("map-box", map);
    return;
  }
  const lat0 = placed.reduce((s, n) => s + n.position.latitude_deg, 0) / placed.length;
  const cos0 = Math.cos((lat0 * Math.PI) / 180);
  const km = (n) => [
    n.position.longitude_deg * cos0 * KM_PER_DEG,
    n.position.latitude_deg * KM_PER_DEG,
  ];
  const xs = placed.map((n) => km(n)[0]);
  const ys = placed.map((n) => km(n)[1]);
  const spanX = Math.max(Math.max(...xs) - Math.min(...xs), 10);
  const spanY = Math.max(Math.max(...ys) - Math.min(...ys), 10);
  const scale = Math.min((W - 2 * pad) / spanX, (H - 2 * pad) / spanY);
  const cx = (Math.max(...xs) + Math.min(...xs)) / 2;
  const cy = (Math.max(...ys) + Math.min(...ys)) / 2;
  const at = (n) => {
    const [x, y] = km(n);
    return [W / 2 + (x - cx) * scale, H / 2 - (y - cy) * scale];
  };
  const where = Object.fromEntries(placed.map((n) => [n.id, at(n)]));

  const links = svg("g", { class: "links" });
  for (const link of network.links) {
    const a = where[link.relay];
    const b = where[link.station];
    if (!a || !b) continue;
    const reading = linkReading(link, link.relay) || linkReading(link, link.station);
    const state = linkState(reading);
    links.append(
      svg(
        "line",
        { x1: a[0], y1: a[1], x2: b[0], y2: b[1], class: `link state-${state}`, "data-kind": "link", "data-id": link.id, "data-state": state },
        svg("title", {}, `${link.id}: ${STATE_WORDS[state]}`),
      ),
    );
    const mx = (a[0] + b[0]) / 2;
    const my = (a[1] + b[1]) / 2;
    links.append(
      svg("text", { x: mx + 6, y: my - 6, class: "link-label" }, link.id, " ",
        svg("tspan", { class: "link-rate", "data-live": `map-rate-${link.id}` }, reading ? fmt(reading.rate_bps, "bit/s") : "–")),
    );
  }
  map.append(links);

  const nodes = svg("g", { class: "nodes" });
  for (const node of placed) {
    const [x, y] = where[node.id];
    const answered = overviewOf(node.id) !== null;
    if (node.role === "relay") {
      const r = ((node.position.station_keeping_radius_m || 0) / 1000) * scale;
      const g = svg("g", { "data-kind": "platform", "data-id": node.id, class: `node platform ${answered ? "up" : "down"}` });
      if (r > 1) g.append(svg("circle", { cx: x, cy: y, r, class: "keeping" }));
      g.append(svg("polygon", { points: `${x},${y - 11} ${x + 11},${y} ${x},${y + 11} ${x - 11},${y}` }));
      const alt = node.position.altitude_m ? ` (${(node.position.altitude_m / 1000).toFixed(0)} km up)` : "";
      g.append(svg("text", { x: x + 15, y: y - 12, class: "node-label" }, node.id + alt));
      nodes.append(g);
    } else {
      const g = svg("g", { "data-kind": "station", "data-id": node.id, class: `node station ${answered ? "up" : "down"}` });
      g.append(svg("circle", { cx: x, cy: y, r: 8 }));
      g.append(svg("text", { x: x + 12, y: y + 18, class: "node-label" }, node.id));
      nodes.append(g);
    }
  }
  map.append(nodes);

  // A scale bar of a round number of kilometres.
  const bar = [1, 2, 5, 10, 20, 50, 100, 200, 500].find((k) => k * scale >= 60) || 1000;
  map.append(svg("line", { x1: 20, x2: 20 + bar * scale, y1: H - 20, y2: H - 20, class: "scale" }));
  map.append(svg("text", { x: 20, y: H - 28, class: "tick" }, `${bar} km`));

  const legend = el(
    "ul",
    { class: "legend" },
    Object.entries(STATE_WORDS).map(([state, words]) => el("li", {}, el("span", { class: `swatch state-${state}` }), words)),
  );
  const missing = network.nodes.filter((n) => !n.position).map((n) => n.id);
  fill(
    "map-box",
    map,
    legend,
    missing.length ? el("p", { class: "empty" }, `no position in the registry: ${missing.join(", ")}`) : null,
  );
}

// ---------------------------------------------------------------- tables

function renderNodes() {
  const rows = network.nodes.map((node) => {
    const a = answers[node.id] || {};
    const o = a.overview;
    return el(
      "tr",
      {},
      el("td", { title: node.description || "" }, node.self ? el("a", { href: "/dashboard" }, node.id) : node.origin ? el("a", { href: `${node.origin}/dashboard` }, node.id) : node.id),
      el("td", {}, node.role),
      el("td", { class: o ? "good" : "bad" }, o ? "answering" : a.error || "asking"),
      el("td", { class: o && !o.ready ? "bad" : "" }, o ? (o.ready ? "ready" : "not ready") : "–"),
      el("td", { class: "num" }, o ? String(o.alerts.length) : "–"),
    );
  });
  fill("nodes", table(["node", "role", "dashboard", "readiness", "alerts"], rows, "no nodes"));
}

function renderAlerts() {
  const items = [];
  for (const node of network.nodes) {
    const a = answers[node.id] || {};
    if (a.error) items.push(el("li", { class: "bad" }, `${node.id}: ${a.error}`));
    for (const alert of a.overview?.alerts || [])
      items.push(el("li", { class: alert.failing ? "bad" : "warn" }, `${node.id}: ${alert.check}: ${alert.note}`));
  }
  fill("alerts", items.length ? el("ul", {}, items) : el("p", { class: "good" }, "no alerts"));
}

function renderLinks() {
  const rows = network.links.map((link) => {
    const r = linkReading(link, link.relay);
    const s = linkReading(link, link.station);
    const any = r || s;
    const qber = any ? (any.qber === null ? "no block in the rate window" : fmt(any.qber, "ratio")) : "–";
    return el(
      "tr",
      {},
      el("td", {}, link.id),
      el("td", {}, `${link.relay} → ${link.station}`),
      el("td", { class: `state-text state-${linkState(r || s)}` }, STATE_WORDS[linkState(r || s)]),
      figure(r?.rate_bps, "bit/s", `rate-relay-${link.id}`),
      figure(s?.rate_bps, "bit/s", `rate-station-${link.id}`),
      figure(any?.planned_bps, "bit/s", `planned-${link.id}`),
      figure(any?.plan_ratio, "share", `ratio-${link.id}`),
      el("td", { class: "num", "data-live": `qber-${link.id}` }, qber),
      figure(r?.bits_available, "bit", `pool-relay-${link.id}`),
      figure(s?.bits_available, "bit", `pool-station-${link.id}`),
    );
  });
  fill(
    "links",
    table(
      ["link", "ends", "state", "rate at relay", "rate at station", "planned", "of plan", "QBER", "pool at relay", "pool at station"],
      rows,
      "no QKD links in the registry",
    ),
  );
}

function renderPairs() {
  const rows = network.pairs.map((pair) => {
    const [a, b] = pair.stations;
    const atRelay = pairReading(pair, pair.relay);
    const atA = pairReading(pair, a);
    const atB = pairReading(pair, b);
    return el(
      "tr",
      {},
      el("td", {}, pair.id),
      el("td", {}, `${a} – ${b}`),
      figure(atA?.ready_bits, "bit", `ready-${pair.id}-${a}`),
      figure(atB?.ready_bits, "bit", `ready-${pair.id}-${b}`),
      figure(atRelay?.target_bits, "bit", `target-${pair.id}`),
      figure(atRelay?.in_flight_bits, "bit", `in-flight-${pair.id}`),
      figure(atRelay?.relayed_bps, "bit/s", `relayed-${pair.id}`),
      figure(atRelay?.time_until_empty_s, "s", `empty-${pair.id}`),
    );
  });
  fill(
    "pairs",
    table(
      ["pair", "stations", "ready at the first", "ready at the second", "target", "on its way", "relayed", "until empty"],
      rows,
      "no pairs in the registry",
    ),
  );
}

function renderDeliveries() {
  const rows = [];
  for (const node of network.nodes) {
    for (const d of overviewOf(node.id)?.deliveries || []) {
      rows.push(
        el(
          "tr",
          {},
          el("td", {}, node.id),
          el("td", {}, d.pair_id),
          figure(d.to_masters.keys, "keys", `masters-${node.id}-${d.pair_id}`),
          figure(d.to_slaves.keys, "keys", `slaves-${node.id}-${d.pair_id}`),
          figure(d.waiting.keys, "keys", `waiting-${node.id}-${d.pair_id}`),
          figure(d.expired.keys, "keys", `expired-${node.id}-${d.pair_id}`),
        ),
      );
    }
  }
  fill(
    "deliveries",
    table(["station", "pair", "to masters", "to slaves", "waiting", "expired"], rows, "no key delivered yet"),
  );
}

// ---------------------------------------------------------------- plots

async function seriesAt(nodeId, series) {
  const node = network.nodes.find((n) => n.id === nodeId);
  if (!node || !overviewOf(nodeId)) return {};
  try {
    return await historyOf(base(node), series, HISTORY_SPAN);
  } catch {
    return {};
  }
}

async function plots() {
  const relays = [...new Set(network.links.map((l) => l.relay))];
  const stations = network.nodes.filter((n) => n.role === "station").map((n) => n.id);
  const wanted = [];
  for (const r of relays) for (const s of ["link_rate_bps", "link_planned_bps", "link_pool_bits", "link_qber", "pair_target_bits"]) wanted.push([r, s]);
  for (const st of stations) for (const s of ["link_pool_bits", "pair_ready_bits", "keys_delivered"]) wanted.push([st, s]);
  const got = {};
  await Promise.all(
    wanted.map(async ([n, s]) => {
      got[`${n}/${s}`] = await seriesAt(n, s);
    }),
  );
  const of = (n, s, subject) => got[`${n}/${s}`]?.[subject] || [];
  const figures = [];
  for (const link of network.links) {
    figures.push(
      linePlot({
        id: `rate-${link.id}`,
        title: `${link.id}: link key rate, observed at the relay and planned`,
        unit: "bit/s",
        lines: [
          { label: "observed", cls: 0, points: of(link.relay, "link_rate_bps", link.id) },
          { label: "planned (clear sky)", cls: 1, points: of(link.relay, "link_planned_bps", link.id) },
        ],
      }),
      linePlot({
        id: `pool-${link.id}`,
        title: `${link.id}: link key pool`,
        unit: "bit",
        lines: [
          { label: `at ${link.relay}`, cls: 0, points: of(link.relay, "link_pool_bits", link.id) },
          { label: `at ${link.station}`, cls: 2, points: of(link.station, "link_pool_bits", link.id) },
        ],
      }),
      linePlot({
        id: `qber-${link.id}`,
        title: `${link.id}: QBER stated by the QKD module, per block received`,
        unit: "ratio",
        lines: [{ label: "QBER", cls: 3, points: of(link.relay, "link_qber", link.id) }],
      }),
    );
  }
  for (const pair of network.pairs) {
    const [a, b] = pair.stations;
    figures.push(
      linePlot({
        id: `buffer-${pair.id}`,
        title: `${pair.id}: ready pair key at each station, and the relay's target`,
        unit: "bit",
        lines: [
          { label: `ready at ${a}`, cls: 0, points: of(a, "pair_ready_bits", pair.id) },
          { label: `ready at ${b}`, cls: 2, points: of(b, "pair_ready_bits", pair.id) },
          { label: "target", cls: 1, points: of(pair.relay, "pair_target_bits", pair.id) },
        ],
      }),
      linePlot({
        id: `delivered-${pair.id}`,
        title: `${pair.id}: keys delivered (cumulative)`,
        unit: "keys",
        lines: [
          { label: `at ${a}`, cls: 0, points: of(a, "keys_delivered", pair.id) },
          { label: `at ${b}`, cls: 2, points: of(b, "keys_delivered", pair.id) },
        ],
      }),
    );
  }
  fill("plots", figures);
}

async function loop() {
  try {
    await refresh();
  } catch (err) {
    fill("updated", `cannot read this node: ${err.message}`);
  }
  setTimeout(loop, LIVE_SECONDS * 1000);
}

loop();
