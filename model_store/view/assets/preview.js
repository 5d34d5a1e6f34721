// rbfgate view, Preview a switch: what a candidate changes, then activate or roll back with a reason
// after a confirmation that names the version.
"use strict";
globalThis.rbfClient.start(async ({main, session, page}) => {
  const {el, draw, fmt} = globalThis.rbfView;
  const {api, path, showProblem} = globalThis.rbfClient;
  if (!session.may.operate) {
    main.append(el("p", {class: "problem", id: "not-allowed"}, session.tokens
      ? `Previewing and switching versions need role operate; token ${session.caller.name} has role ${session.caller.role}.`
      : "Previewing and switching versions need a token with role operate; this service runs without a tokens file."));
    return;
  }
  const described = await api(path("/models", page.model));
  let active = described.active ? described.active.version : null;
  let rollbackTarget = null;  // the version a rollback would return to, from the timeline
  const candidates = described.versions.filter((item) => item.version !== active).reverse();
  const select = el("select", {id: "candidate", name: "candidate"},
    (candidates.length ? candidates : described.versions).map((item) => el("option", {value: item.version}, `${item.version} (published ${item.published_at})`)));
  const report = el("div", {id: "report"});
  const run = el("button", {type: "submit"}, "Preview");
  main.append(el("section", {class: "panel"}, el("h2", {}, "Candidate"),
    el("p", {}, `Active now: ${active || "none"}. The preview scores the golden vectors of both versions and the records this worker saw recently with both, and changes nothing.`),
    el("form", {class: "actions", onsubmit: (event) => { event.preventDefault(); preview(select.value); }},
      el("label", {for: "candidate"}, "Version "), select, run), report));
  const switchPanel = el("section", {class: "panel", id: "switch"}, el("h2", {}, "Switch"));
  const history = el("section", {class: "panel", id: "history"}, el("h2", {}, "Recent switches"));
  main.append(switchPanel, history);
  await showHistory();
  if (candidates.length) await preview(select.value);

  function table(headers, rows, id) {
    return el("div", {class: "table-wrap"}, el("table", {id: id}, el("thead", {}, el("tr", {}, headers.map((name) => el("th", {}, name)))),
      el("tbody", {}, rows.map((row) => el("tr", {}, row.map((cell) => el("td", {}, cell)))))));
  }

  async function preview(version) {
    report.replaceChildren(el("p", {class: "muted"}, `Comparing ${version} with ${active}...`));
    let data;
    try {
      data = await api(path("/view/data/models", page.model, "preview"), {method: "POST", body: {version: version}});
    } catch (error) {
      report.replaceChildren();
      showProblem(report, error, "No preview");
      return;
    }
    const r = data.preview.report;
    report.replaceChildren();
    report.append(el("h3", {}, `${r.candidate.version} against the active ${r.active.version}`),
      globalThis.rbfView.facts([
        ["rows compared", `${r.rows.total} (${Object.entries(r.rows.by_source).map(([source, count]) => `${count} ${source}`).join(", ")}); ${r.rows.scored_by_both} scored by both`],
        ["label flips", el("span", {id: "flips"}, `${r.label_flips.count}` + (r.label_flips.count ? ` (${Object.entries(r.label_flips.by_source).filter(([, n]) => n).map(([source, n]) => `${n} ${source}`).join(", ")})` : ""))],
        ["largest probability change", r.largest_probability_change ? `${fmt(r.largest_probability_change.change)} (class ${r.largest_probability_change.class}, ${r.largest_probability_change.source} row ${r.largest_probability_change.row})` : "-"],
        ["largest decision change", r.largest_decision_change ? fmt(r.largest_decision_change.change) : "-"],
        ["refused by one only", `${r.refusals.candidate_only} only by the candidate, ${r.refusals.active_only} only by the active version`],
      ]));
    if (r.comparable_note) report.append(el("p", {class: "problem"}, r.comparable_note));
    const flipTable = r.label_flips.table;
    report.append(el("h3", {}, "Labels: active (rows) by candidate (columns)"),
      table(["active \\ candidate", ...flipTable.candidate_classes.map(String)],
        flipTable.active_classes.map((label, index) => [String(label), ...flipTable.counts[index].map(String)]), "flip-table"));
    const verdicts = r.domain_verdict_changes;
    if (verdicts && verdicts.verdicts) {
      report.append(el("h3", {}, `Domain verdicts: active (rows) by candidate (columns); ${verdicts.changed} would change`),
        table(["active \\ candidate", ...verdicts.verdicts], verdicts.verdicts.map((verdict, index) => [verdict, ...verdicts.counts[index].map(String)]), "verdict-table"));
    }
    if (data.charts.changes) {
      report.append(el("h3", {}, "Distribution of changes"));
      const box = el("div", {});
      report.append(box);
      await draw(box, data.charts.changes, "changes");
    }
    const contract = r.contract;
    report.append(el("h3", {}, "Contract comparison"));
    if (!contract.changes.length) {
      report.append(el("p", {id: "contract"}, "Unchanged: same features, units, ranges, classes, probabilities and domain model."));
    } else {
      if (contract.range_basis) report.append(el("p", {id: "range-basis"}, `Narrowed ranges judged on: ${contract.range_basis}.`));
      // Lists are ranges, objects the domain model's thresholds and refuse rate.
      const shown = (value) => Array.isArray(value) ? `[${value.map((item) => fmt(item)).join(", ")}]`
        : (value === null ? "-" : (typeof value === "object"
          ? Object.entries(value).map(([key, item]) => `${key.replace(/_/g, " ")} ${fmt(item)}`).join(", ") : String(value)));
      report.append(table(["change", "active", "candidate", "breaking"], contract.changes.map((change) => [
        el("span", {}, change.kind.replace(/_/g, " "), change.subject === null ? "" : `: ${change.subject}`,
          el("div", {class: "legend-note"}, change.detail)),
        shown(change.active), shown(change.candidate),
        el("span", {class: "badge " + (change.breaking ? "bad" : "ok")}, change.breaking ? "breaking" : "compatible")]), "contract"));
    }
    offerSwitch(r.candidate.version, contract.breaking.length > 0);
  }

  function confirmBox(text, label, action) {
    const box = el("div", {class: "confirm", role: "alertdialog", id: "confirm"},
      el("p", {}, text),
      el("div", {class: "actions"},
        el("button", {type: "button", class: "danger", id: "confirm-yes", onclick: async () => { box.remove(); await action(); }}, label),
        el("button", {type: "button", class: "secondary", onclick: () => box.remove()}, "Cancel")));
    return box;
  }

  function offerSwitch(version, breaking) {
    switchPanel.replaceChildren(el("h2", {}, "Switch"));
    const reason = el("input", {type: "text", id: "reason", name: "reason", maxlength: 1000, size: 40, placeholder: "why (kept in the history)"});
    const accept = breaking ? el("input", {type: "checkbox", id: "accept-breaking"}) : null;
    const outcome = el("div", {id: "outcome", "aria-live": "polite"});
    const activate = el("button", {type: "button", id: "activate", onclick: () => {
      outcome.replaceChildren();
      if (!reason.value.trim()) { outcome.append(el("p", {class: "problem"}, "Give a reason: it is kept in the history.")); return; }
      outcome.append(confirmBox(`Activate ${page.model} ${version} for every caller of POST /score/${page.model}?`, `Yes, activate ${version}`,
        () => change("activate", {version: version, reason: reason.value.trim(), accept_breaking: accept ? accept.checked : false}, outcome)));
    }}, `Activate ${version}...`);
    switchPanel.append(el("div", {class: "actions"}, el("label", {for: "reason"}, "Reason "), reason),
      accept ? el("p", {}, accept, el("label", {for: "accept-breaking"}, " Activate although the contract comparison lists breaking changes")) : null,
      el("div", {class: "actions"}, activate, rollbackButton(reason, outcome)), outcome);
  }

  function rollbackButton(reason, outcome) {
    if (!rollbackTarget) return el("span", {class: "muted"}, "No earlier activation to roll back to.");
    return el("button", {type: "button", class: "secondary", id: "rollback", onclick: () => {
      outcome.replaceChildren();
      if (!reason.value.trim()) { outcome.append(el("p", {class: "problem"}, "Give a reason: it is kept in the history.")); return; }
      outcome.append(confirmBox(`Roll ${page.model} back from ${active} to ${rollbackTarget}?`, `Yes, roll back to ${rollbackTarget}`,
        () => change("rollback", {reason: reason.value.trim()}, outcome)));
    }}, `Roll back to ${rollbackTarget}...`);
  }

  async function change(action, body, outcome) {
    try {
      const done = await api(path("/models", page.model, action), {method: "POST", body: body});
      active = done.entry.version;
      outcome.append(el("p", {class: "answer", id: "switched"}, `${done.entry.action}: ${page.model} ${done.entry.version} is active `,
        `(entry ${done.entry.seq} by ${done.entry.actor}). `, el("a", {href: path("/view/models", page.model)}, "See the timeline")));
      await showHistory();
    } catch (error) {
      showProblem(outcome, error, `Not ${action === "activate" ? "activated" : "rolled back"}`);
    }
  }

  async function showHistory() {
    history.replaceChildren(el("h2", {}, "Recent switches"));
    const data = await api(path("/view/data/models", page.model, "timeline"));
    rollbackTarget = data.timeline.rollback_to;
    const rows = data.timeline.switches.slice(-10).reverse().map((item) => [item.time, item.action, item.version, item.actor, item.via || "-", item.reason || ""]);
    history.append(rows.length ? table(["time (UTC)", "action", "version", "who", "via", "why"], rows, "recent-switches")
      : el("p", {class: "muted"}, "No switches yet."));
  }
});
