// keystrata dashboard: the page of this node (its links, pairs, deliveries, alerts and
// their history), read from this node's own /api/v1/dashboard routes.

import { STATE_WORDS, el, figure, fill, fmt, getJson, historyOf, linePlot, linkState, table } from "./common.js";

const LIVE_SECONDS = 5;
const HISTORY_SPAN = 3600;
let lastHistory = 0;

function renderHead(o) {
  const pos = o.node.position;
  const where = pos ? ` at ${pos.latitude_deg.toFixed(3)}°, ${pos.longitude_deg.toFixed(3)}°` : "";
  document.title = `keystrata ${o.node.id}`;
  fill("title", `${o.node.role === "relay" ? "Relay" : "Station"} ${o.node.id}`);
  fill("subtitle", `${o.node.description || ""}${where} · keystrata ${o.node.version}`);
}

function renderAlerts(o) {
  const items = o.alerts.map((a) => el("li", { class: a.failing ? "bad" : "warn" }, `${a.check}: ${a.note}`));
  fill(
    "alerts",
    el("p", { class: o.ready ? "good" : "bad" }, o.ready ? "ready" : "not ready"),
    items.length ? el("ul", {}, items) : el("p", { class: "good" }, "no alerts"),
  );
}

function renderLinks(o) {
  const rows = o.links.map((l) =>
    el(
      "tr",
      {},
      el("td", {}, l.link_id),
      el("td", {}, l.peer_node_id),
      el("td", { class: `state-text state-${linkState(l)}` }, STATE_WORDS[linkState(l)]),
      figure(l.rate_bps, "bit/s", `rate-${l.link_id}`),
      figure(l.planned_bps, "bit/s", `planned-${l.link_id}`),
      figure(l.plan_ratio, "share", `ratio-${l.link_id}`),
      el("td", { class: "num", "data-live": `qber-${l.link_id}` }, l.qber === null ? "no block in the rate window" : fmt(l.qber, "ratio")),
      figure(l.bits_available, "bit", `pool-${l.link_id}`),
      figure(l.bits_received, "bit", `received-${l.link_id}`),
    ),
  );
  fill(
    "links",
    table(["link", "other end", "state", "rate", "planned", "of plan", "QBER", "pool", "received"], rows, "no QKD link ends here"),
  );
}

function renderPairs(o) {
  const relay = o.node.role === "relay";
  const rows = o.pairs.map((p) =>
    relay
      ? el(
          "tr",
          {},
          el("td", {}, p.pair_id),
          el("td", {}, p.stations.join(" – ")),
          ...p.stations.map((s) => figure(p.ready_by_station[s], "bit", `ready-${p.pair_id}-${s}`)),
          figure(p.target_bits, "bit", `target-${p.pair_id}`),
          figure(p.in_flight_bits, "bit", `in-flight-${p.pair_id}`),
          figure(p.relayed_bps, "bit/s", `relayed-${p.pair_id}`),
          figure(p.time_until_empty_s, "s", `empty-${p.pair_id}`),
        )
      : el(
          "tr",
          {},
          el("td", {}, p.pair_id),
          el("td", {}, p.stations.join(" – ")),
          figure(p.ready_bits, "bit", `ready-${p.pair_id}`),
          figure(p.owned_bits, "bit", `owned-${p.pair_id}`),
          figure(p.pending_bits, "bit", `pending-${p.pair_id}`),
          figure(p.demand_bps, "bit/s", `demand-${p.pair_id}`),
          figure(p.time_until_empty_s, "s", `empty-${p.pair_id}`),
        ),
  );
  const headers = relay
    ? ["pair", "stations", "ready at the first (reported)", "ready at the second (reported)", "target", "on its way", "relayed", "until empty"]
    : ["pair", "stations", "ready here", "owned here", "confirming", "masters' demand", "owned key lasts"];
  fill("pairs", table(headers, rows, "no pairs here"));
}

function renderDeliveries(o) {
  const section = document.getElementById("deliveries-section");
  section.hidden = o.node.role === "relay";
  const rows = o.deliveries.map((d) =>
    el(
      "tr",
      {},
      el("td", {}, d.pair_id),
      figure(d.to_masters.keys, "keys", `masters-${d.pair_id}`),
      figure(d.to_slaves.keys, "keys", `slaves-${d.pair_id}`),
      figure(d.waiting.keys, "keys", `waiting-${d.pair_id}`),
      figure(d.expired.keys, "keys", `expired-${d.pair_id}`),
    ),
  );
  fill("deliveries", table(["pair", "to masters", "to slaves", "waiting", "expired"], rows, "no key delivered yet"));
}

async function renderPlots(o) {
  const relay = o.node.role === "relay";
  const names = ["link_rate_bps", "link_planned_bps", "link_pool_bits", "link_qber"];
  names.push(...(relay ? ["pair_target_bits", "pair_ready_bits", "pair_in_flight_bits"] : ["pair_ready_bits", "pair_owned_bits", "keys_delivered"]));
  const got = Object.fromEntries(await Promise.all(names.map(async (n) => [n, await historyOf("", n, HISTORY_SPAN)])));
  const of = (series, subject) => got[series][subject] || [];
  const figures = [];
  for (const l of o.links) {
    figures.push(
      linePlot({
        id: `rate-${l.link_id}`,
        title: `${l.link_id}: link key rate`,
        unit: "bit/s",
        lines: [
          { label: "observed", cls: 0, points: of("link_rate_bps", l.link_id) },
          { label: "planned (clear sky)", cls: 1, points: of("link_planned_bps", l.link_id) },
        ],
      }),
      linePlot({ id: `pool-${l.link_id}`, title: `${l.link_id}: link key pool`, unit: "bit", lines: [{ label: "pool", cls: 2, points: of("link_pool_bits", l.link_id) }] }),
      linePlot({ id: `qber-${l.link_id}`, title: `${l.link_id}: QBER stated by the QKD module`, unit: "ratio", lines: [{ label: "QBER", cls: 3, points: of("link_qber", l.link_id) }] }),
    );
  }
  for (const p of o.pairs) {
    const lines = relay
      ? [
          { label: "ready (smaller report)", cls: 0, points: of("pair_ready_bits", p.pair_id) },
          { label: "target", cls: 1, points: of("pair_target_bits", p.pair_id) },
          { label: "on its way", cls: 4, points: of("pair_in_flight_bits", p.pair_id) },
        ]
      : [
          { label: "ready", cls: 0, points: of("pair_ready_bits", p.pair_id) },
          { label: "owned", cls: 2, points: of("pair_owned_bits", p.pair_id) },
        ];
    figures.push(linePlot({ id: `buffer-${p.pair_id}`, title: `${p.pair_id}: pair key buffer`, unit: "bit", lines }));
    if (!relay)
      figures.push(
        linePlot({ id: `delivered-${p.pair_id}`, title: `${p.pair_id}: keys delivered (cumulative)`, unit: "keys", lines: [{ label: "keys", cls: 0, points: of("keys_delivered", p.pair_id) }] }),
      );
  }
  fill("plots", figures);
}

async function loop() {
  try {
    const o = await getJson("", "/api/v1/dashboard/overview");
    renderHead(o);
    renderAlerts(o);
    renderLinks(o);
    renderPairs(o);
    renderDeliveries(o);
    fill("updated", `updated ${o.at.slice(11, 19)} UTC`);
    if (Date.now() / 1000 - lastHistory >= Math.max(o.sample_seconds, 10)) {
      lastHistory = Date.now() / 1000;
      await renderPlots(o);
    }
  } catch (err) {
    fill("updated", `cannot read this node: ${err.message}`);
  }
  setTimeout(loop, LIVE_SECONDS * 1000);
}

loop();
