// rbfgate view, Timeline: which version was live when, every switch, the chain check, and "live at".
"use strict";
globalThis.rbfClient.start(async ({main, page}) => {
  const {el, draw} = globalThis.rbfView;
  const {api, path, showProblem} = globalThis.rbfClient;
  const data = await api(path("/view/data/models", page.model, "timeline"));
  const check = data.verification;
  main.append(el("section", {class: "panel"}, el("h2", {}, "History chain"),
    el("p", {}, el("span", {class: "badge " + (check.ok ? "ok" : "bad"), id: "chain"}, check.ok ? "verified" : "NOT verified"),
      check.ok ? ` ${check.entries} entries, hash chain and active pointer agree.` : ` ${check.problem}`)));

  const plot = el("section", {class: "panel"}, el("h2", {}, "Live versions over time"));
  main.append(plot);
  if (data.timeline.chart) {
    const box = el("div", {});
    plot.append(box);
    await draw(box, data.timeline.chart, "timeline");
  } else {
    plot.append(el("p", {class: "muted"}, "No version has been activated yet."));
  }

  const answer = el("div", {id: "live-answer", "aria-live": "polite"});
  const input = el("input", {type: "text", id: "live-at", name: "at", value: new Date().toISOString().replace(/\.\d+Z$/, "Z"),
    "aria-label": "moment (RFC 3339)", size: 24});
  const form = el("form", {onsubmit: async (event) => {
    event.preventDefault();
    answer.replaceChildren();
    try {
      // The store's own lookup, GET /models/{model}/history?at=TIME (404 before the first activation).
      const found = await api(path("/models", page.model, "history") + "?at=" + encodeURIComponent(input.value.trim()));
      const made = found.made_live;
      answer.append(el("p", {class: "answer"}, "Live at ", found.at, ": ", el("span", {class: "label"}, found.version),
        ` (since ${made.time}: ${made.action} by ${made.actor}${made.via ? " via " + made.via : ""}, ${made.reason || ""})`,
        found.ended ? ` until ${found.ended.time}` : ", still live"));
    } catch (error) {
      showProblem(answer, error, "No answer");
    }
  }}, el("label", {for: "live-at"}, "Which version was live at "), input, " ", el("button", {type: "submit"}, "Answer"));
  main.append(el("section", {class: "panel"}, el("h2", {}, "Live at"), form, answer));

  const rows = data.timeline.switches.slice().reverse().map((item) => el("tr", {},
    el("td", {}, item.time), el("td", {}, item.action), el("td", {}, item.version), el("td", {}, item.actor),
    el("td", {}, item.via || "-"), el("td", {}, item.reason || "")));
  main.append(el("section", {class: "panel"}, el("h2", {}, "Switches, newest first"),
    el("div", {class: "table-wrap"}, el("table", {id: "switches"},
      el("thead", {}, el("tr", {}, ["time (UTC)", "action", "version", "who", "via", "why"].map((name) => el("th", {}, name)))),
      el("tbody", {}, rows)))));
});
