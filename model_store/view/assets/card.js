// rbfgate view: the model card, drawn from the card document (model_store/view/card.py).
// Used by the served card page, the try page (features and distances) and the offline card.
"use strict";
(function () {
  const {draw, el, facts, fmt} = globalThis.rbfView;

  function panel(title, ...children) {
    return el("section", {class: "panel"}, el("h2", {}, title), ...children);
  }

  function identity(card, options) {
    const id = card.identity;
    const origin = id.origin || {};
    const signature = id.signature || {};
    const test = id.self_test || {};
    const rows = [
      ["model", card.model], ["version", card.version],
      ["bundle digest (SHA-256)", el("span", {class: "mono"}, id.bundle_sha256)],
      ["format", id.format], ["exported", id.created], ["exported by", id.creator],
    ];
    if (origin.kind === "store") {
      rows.push(["published", origin.published_at], ["active", origin.active ? "yes" : "no"]);
    } else if (origin.kind === "file") {
      rows.push(["file", origin.name]);
    }
    rows.push(["signature", signature.signed
      ? [signature.signer ? `signed by ${signature.signer}, ` : "signed, ",
         `key ${signature.key_id || "?"}`, signature.signed_at ? ` at ${signature.signed_at}` : "",
         ` (${signature.checked})`].join("")
      : signature.checked]);
    rows.push(["golden self-test", el("span", {},
      el("span", {class: "badge " + (test.passed ? "ok" : "bad")}, test.passed ? "passed" : "failed"),
      ` ${test.vectors} vectors; ${(test.checked || []).join(", ")} within ${test.tolerance}`)]);
    rows.push(["estimator", `${id.estimator}, ${id.scaler} scaler, ${id.calibration === "none" ? "uncalibrated" : id.calibration + " calibration"}`]);
    rows.push(["kernel", `RBF, gamma ${fmt(id.kernel.gamma)}, sigma ${fmt(id.kernel.sigma)} (scaled space)`]);
    const libraries = Object.entries(id.libraries || {}).map(([name, version]) => `${name} ${version}`).join(", ");
    rows.push(["exported with", libraries || "-"]);
    if (id.reference) {
      rows.push(["reference rows", `${fmt(id.reference.rows)} rows of ${id.reference.file || "?"} (${id.reference.role || "reference"})`]);
    }
    const section = panel("Identity", facts(rows));
    if (options.download) {
      section.append(el("div", {class: "actions"}, options.download));
    }
    return section;
  }

  function classes(card) {
    const body = card.classes.map((item) => el("tr", {}, el("td", {}, String(item.label)), el("td", {}, fmt(item.support_vectors))));
    return panel("Classes", el("div", {class: "table-wrap"},
      el("table", {}, el("thead", {}, el("tr", {}, el("th", {}, "class"), el("th", {}, "support vectors"))), el("tbody", {}, body))));
  }

  async function metrics(container, card) {
    const section = panel("Metrics");
    container.append(section);
    if (!card.metrics) {
      section.append(el("p", {class: "muted"}, "No metrics recorded in this bundle."));
      return;
    }
    const names = [["rows", "rows"], ["accuracy", "accuracy"], ["balanced_accuracy", "balanced accuracy"],
      ["macro_f1", "macro F1"], ["roc_auc", "ROC AUC"], ["log_loss", "log loss"], ["brier_score", "Brier score"]];
    section.append(el("p", {class: "muted"}, `On the ${card.metrics_source}.`));
    section.append(facts(names.filter(([key]) => key in card.metrics).map(([key, label]) => [label, card.metrics[key]])));
    const grid = el("div", {class: "grid"});
    section.append(grid);
    const jobs = [];
    if (card.charts.confusion) {
      const box = el("div", {});
      grid.append(box);
      jobs.push(draw(box, card.charts.confusion, "confusion"));
    }
    if (card.charts.reliability) {
      const box = el("div", {});
      grid.append(box);
      jobs.push(draw(box, card.charts.reliability, "reliability"));
    }
    await Promise.all(jobs);
  }

  // One strip per feature; resolves to {name: Vega view} so the try page can place a record.
  async function renderFeatures(container, card) {
    const section = panel("Features",
      el("p", {class: "legend-note"},
        "Light band: allowed range (values outside are refused). Ticks: quantiles of the reference rows every 5 % ",
        "(plus 1 % and 99 %); dark box: 25-75 %. Green bar: the kernel width sigma in the feature's own unit, from the median. ",
        "Dashed line: an inferred bound."));
    container.append(section);
    const views = {};
    const jobs = card.features.map((feature) => {
      const box = el("div", {});
      const allowed = `allowed [${fmt(feature.allowed[0])}, ${fmt(feature.allowed[1])}]${feature.unit ? " " + feature.unit : ""}`;
      const stats = feature.training;
      section.append(el("div", {class: "feature", "data-feature": feature.name},
        el("h3", {}, feature.name, feature.unit ? el("span", {class: "muted"}, ` (${feature.unit})`) : null),
        feature.description ? el("p", {class: "muted"}, feature.description) : null,
        el("p", {class: "legend-note"}, `${allowed}; reference min ${fmt(stats.min)}, mean ${fmt(stats.mean)}, `,
          `max ${fmt(stats.max)}, std ${fmt(stats.std)}; kernel width ${fmt(feature.kernel_width)}`,
          feature.inferred_low !== null ? `; inferred lower bound ${fmt(feature.inferred_low)}` : ""),
        box));
      return draw(box, card.charts.features[feature.name], "feature").then((view) => { views[feature.name] = view; });
    });
    await Promise.all(jobs);
    return views;
  }

  async function renderDistance(container, card) {
    const distance = card.distance;
    const section = panel("Distance to the nearest support vector",
      el("p", {class: "legend-note"},
        `How far reference rows lie from the nearest support vector (scaled space; ${fmt(distance.rows)} rows): `,
        `median ${fmt(distance.median)}, 95 % within ${fmt(distance.p95)}, 99 % within ${fmt(distance.p99)}, `,
        `largest ${fmt(distance.max)}. Every answer reports a record's distance and its percentile among these rows.`));
    container.append(section);
    const box = el("div", {});
    section.append(box);
    return draw(box, card.charts.distance, "distance");
  }

  function refusalReport(card) {
    if (!card.refusal_report) return null;
    const report = card.refusal_report;
    return panel("Refusal report", el("pre", {class: "mono"}, JSON.stringify(report, null, 2)));
  }

  async function render(container, card, options) {
    options = options || {};
    container.replaceChildren(el("h1", {}, `Model card: ${card.model} ${card.version}`));
    container.append(identity(card, options), classes(card));
    await metrics(container, card);
    const features = await renderFeatures(container, card);
    const distance = await renderDistance(container, card);
    const report = refusalReport(card);
    if (report) container.append(report);
    if (card.notes.length) {
      container.append(panel("Notes", el("ul", {}, card.notes.map((note) => el("li", {}, note)))));
    }
    return {features: features, distance: distance};
  }

  globalThis.rbfCard = {render: render, renderFeatures: renderFeatures, renderDistance: renderDistance};
})();
