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
    // Every cell first, then the plots: a plot takes its width from its cell when it is drawn.
    const plots = [["confusion", card.charts.confusion], ["reliability", card.charts.reliability]].filter(([, spec]) => spec)
      .map(([name, spec]) => { const box = el("div", {}); grid.append(box); return [box, spec, name]; });
    await Promise.all(plots.map(([box, spec, name]) => draw(box, spec, name)));
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
        `largest ${fmt(distance.max)}. Every answer reports a record's distance and its percentile among these rows; `,
        `the refusal rules are the allowed ranges and the domain model below, not this distance.`));
    container.append(section);
    const box = el("div", {});
    section.append(box);
    return draw(box, card.charts.distance, "distance");
  }

  function percent(share) { return `${(100 * share).toFixed(2)} %`; }

  function refusalReport(card) {
    const report = card.refusal_report;
    if (!report) return null;
    const columns = [["rows", "rows", fmt], ["refused_range", "refused by a range", percent],
      ["refused_domain", "refused outside the domain", percent], ["flagged_unusual", "answered, flagged unusual", percent],
      ["refused_total", "refused in all", percent]];
    const sample = report.out_of_sample;
    const rows = [["reference", report.reference], ["holdout", report.holdout]].filter(([, shares]) => shares);
    if (sample) {  // bundles exported before the out-of-sample choice have no estimate
      rows.push(["new rows (estimated)", Object.assign({rows: sample.rows, flagged_unusual: null}, sample.estimate)]);
    }
    const show = (value, format) => (value === null || value === undefined ? "not estimated" : format(value));
    const how = sample
      ? `The margin (${fmt(sample.margin)} x each feature's span, ${sample.margin_source === "given" ? "given at export" : "chosen"}) `
        + `and the domain thresholds were chosen on rows scored out of sample (${sample.method}, seed ${sample.seed}) so that `
        + `the two rules together refuse about ${percent(report.refuse_rate)} of new rows, `
        + `${fmt(100 * sample.range_share)} % of that by the ranges; the last row estimates what they refuse of rows the `
        + `export never saw. The reference and holdout rows are those the policy was derived from.`
      : `What the refusal policy does to the rows the bundle was exported with; the domain thresholds were set so that `
        + `about ${percent(report.refuse_rate)} of real rows are refused.`;
    return panel("Refusal report",
      el("p", {class: "legend-note"}, how),
      el("div", {class: "table-wrap"}, el("table", {id: "refusal-report"},
        el("thead", {}, el("tr", {}, el("th", {}, "rows from"), columns.map(([, label]) => el("th", {}, label)))),
        el("tbody", {}, rows.map(([name, shares]) => el("tr", {}, el("td", {}, name),
          columns.map(([key, , format]) => el("td", {}, show(shares[key], format)))))))));
  }

  // The domain model and the service's thresholds; resolves to the chart's Vega view (or null).
  async function renderDomain(container, card) {
    const domain = card.domain;
    if (!domain) return null;
    const calibration = domain.calibration;
    const section = panel("Domain",
      el("p", {class: "legend-note"}, "A one-class SVM in the classifier's scaled space says whether a record looks like the "
        + "rows the model was fitted on. Every answer carries its verdict and score; records outside are refused "
        + "(reason outside_domain) unless the operators chose to flag them."),
      facts([
        ["model", `${domain.method}, nu ${fmt(domain.nu)}, gamma ${fmt(domain.gamma)}, ${fmt(domain.support_vectors)} support vectors, fitted on ${fmt(domain.fit_rows)} rows`],
        ["thresholds", `outside below ${fmt(domain.thresholds.outside_below)}, unusual below ${fmt(domain.thresholds.unusual_below)}`],
        ["set from", calibration.source === "cross-fitting"
          ? `${fmt(calibration.rows)} rows scored out of sample, with the range margin: about ${percent(calibration.refuse_rate)} refused by ranges and domain together, ${percent(calibration.unusual_rate)} unusual`
          : `${fmt(calibration.rows)} ${calibration.source} rows: about ${percent(calibration.refuse_rate)} outside, ${percent(calibration.unusual_rate)} unusual`],
      ]));
    container.append(section);
    const box = el("div", {});
    section.append(box);
    return draw(box, card.charts.domain, "domain");
  }

  async function render(container, card, options) {
    options = options || {};
    container.replaceChildren(el("h1", {}, `Model card: ${card.model} ${card.version}`));
    container.append(identity(card, options), classes(card));
    await metrics(container, card);
    const features = await renderFeatures(container, card);
    const distance = await renderDistance(container, card);
    const domain = await renderDomain(container, card);
    const report = refusalReport(card);
    if (report) container.append(report);
    if (card.notes.length) {
      container.append(panel("Notes", el("ul", {}, card.notes.map((note) => el("li", {}, note)))));
    }
    return {features: features, distance: distance, domain: domain};
  }

  globalThis.rbfCard = {render: render, renderDistance: renderDistance, renderDomain: renderDomain, renderFeatures: renderFeatures};
})();
