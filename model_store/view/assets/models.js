// rbfgate view, Models: each model with its active version, its last switch and this worker's traffic.
"use strict";
globalThis.rbfClient.start(async ({main, session}) => {
  const {el, draw, fmt} = globalThis.rbfView;
  const {api, path} = globalThis.rbfClient;
  const data = await api("/view/data/models");
  const section = el("section", {class: "panel"}, el("h2", {}, "Models in the store"));
  main.append(section);
  if (!data.models.length) {
    section.append(el("p", {class: "muted"}, "The store holds no models yet: publish one with rbfgate publish."));
    return;
  }
  const rows = data.models.map((item) => {
    const base = path("/view/models", item.model);
    const active = item.active;
    const switched = item.last_switch;
    const traffic = item.traffic;
    return el("tr", {"data-model": item.model},
      el("td", {}, el("strong", {}, item.model)),
      el("td", {}, active ? active.version : el("span", {class: "muted"}, "none active")),
      el("td", {}, active ? active.activated_at : "-",
        switched ? el("div", {class: "muted"}, `${switched.action} by ${switched.actor}${switched.via ? " via " + switched.via : ""}: ${switched.reason || ""}`) : null),
      el("td", {}, `${fmt(traffic.requests)} requests, ${fmt(traffic.records.scored)} scored, ${fmt(traffic.records.refused)} refused`,
        traffic.refused_share !== null ? el("div", {class: "muted"}, `${(100 * traffic.refused_share).toFixed(1)} % of records refused`) : null,
        traffic.requests ? el("div", {class: "muted"}, "domain verdicts: " + Object.entries(traffic.domain_verdicts).map(([verdict, count]) => `${count} ${verdict}`).join(", ")) : null),
      el("td", {}, el("a", {href: base}, "Timeline"), " · ",
        active ? el("a", {href: path(base + "/versions", active.version)}, "Card") : null, active ? " · " : null,
        el("a", {href: base + "/try"}, "Try"), " · ", el("a", {href: base + "/preview"}, "Preview")));
  });
  section.append(el("div", {class: "table-wrap"}, el("table", {},
    el("thead", {}, el("tr", {}, ["model", "active version", "switched", "traffic (this worker)", "pages"].map((name) => el("th", {}, name)))),
    el("tbody", {}, rows))));
  if (!session.may.read_history) {
    section.append(el("p", {class: "legend-note"}, "Who switched each model is in its history, which needs role operate or audit."));
  }
  const traffic = el("section", {class: "panel"}, el("h2", {}, "Live traffic"),
    el("p", {class: "legend-note"}, "Records this worker answered since it started, from the service's own counters (/metrics)."));
  main.append(traffic);
  if (data.charts.traffic) {
    const box = el("div", {});
    traffic.append(box);
    await draw(box, data.charts.traffic, "traffic");
  } else {
    traffic.append(el("p", {class: "muted"}, "No records scored yet."));
  }
});
