// rbfgate view, Try a record: a form from the active version's record schema, the answer, and the
// record's place on the feature strips and the distance histogram; refusals next to their field.
"use strict";
globalThis.rbfClient.start(async ({main, session, page}) => {
  const {el, fmt} = globalThis.rbfView;
  const {api, path, showProblem} = globalThis.rbfClient;
  const described = await api(path("/models", page.model));
  if (!described.active) {
    main.append(el("p", {class: "problem"}, `${page.model} has no active version; activate one first.`));
    return;
  }
  const version = described.active.version;
  const [card, schema] = await Promise.all([
    api(path("/view/data/models", page.model, "versions", version, "card")),
    api(path("/models", page.model, "versions", version, "schema")),
  ]);
  const typical = {};
  for (const feature of card.features) {
    const q = feature.quantiles;
    const median = q ? q.values[q.levels.indexOf(0.5)] : undefined;
    typical[feature.name] = median !== undefined ? median : feature.training.mean;
  }
  const fields = {};
  const form = el("form", {class: "record", novalidate: true, id: "record-form"});
  for (const name of schema.required) {
    const property = schema.properties[name];
    const input = el("input", {type: "text", inputmode: "decimal", name: name, id: "field-" + name,
      value: fmt(typical[name], 4), autocomplete: "off"});
    const refusal = el("span", {class: "refusal", "aria-live": "polite"});
    const wrapper = el("div", {class: "field", "data-field": name},
      el("label", {for: "field-" + name}, name),
      el("span", {class: "hint"}, `${property.description ? property.description + "; " : ""}allowed [${fmt(property.minimum)}, ${fmt(property.maximum)}]`),
      input, refusal);
    fields[name] = {input: input, refusal: refusal, wrapper: wrapper};
    form.append(wrapper);
  }
  const submit = el("button", {type: "submit", form: "record-form"}, `Score with ${version}`);
  const reset = el("button", {type: "button", class: "secondary", onclick: () => {
    for (const [name, field] of Object.entries(fields)) field.input.value = fmt(typical[name], 4);
  }}, "Typical record");
  const answer = el("div", {id: "answer", "aria-live": "polite"});
  main.append(el("section", {class: "panel"}, el("h2", {}, `Record for ${page.model} ${version}`),
    el("p", {class: "legend-note"}, "Pre-filled with the median of the reference rows. Leave a field empty to send it missing."),
    form, el("div", {class: "actions"}, submit, reset), answer));
  if (!session.may.score) {
    submit.disabled = true;
    answer.append(el("p", {class: "problem"}, `Scoring needs role score; ${session.caller ? `token ${session.caller.name} has role ${session.caller.role}` : "this caller may not score"}.`));
  }
  const views = {features: await globalThis.rbfCard.renderFeatures(main, card), distance: await globalThis.rbfCard.renderDistance(main, card),
    domain: await globalThis.rbfCard.renderDomain(main, card)};

  const NUMBER = /^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$/;
  function record() {
    const values = {};
    for (const [name, field] of Object.entries(fields)) {
      const text = field.input.value.trim();
      if (text === "") continue;
      values[name] = NUMBER.test(text) ? Number(text) : text;
    }
    return values;
  }

  function reasonText(problem) {
    const range = problem.allowed ? `[${fmt(problem.allowed[0])}, ${fmt(problem.allowed[1])}]` : "";
    switch (problem.reason) {
      case "out_of_range": return `refused: ${problem.value} is outside the allowed range ${range}`;
      case "missing": return "refused: missing; every feature is required";
      case "not_a_number": return `refused: ${JSON.stringify(problem.value)} is not a number`;
      case "outside_domain": return `refused: outside the domain the model was fitted on (domain score ${fmt(problem.value)})`;
      default: return `refused: ${problem.reason.replace(/_/g, " ")}${problem.value !== null && problem.value !== undefined ? " (" + fmt(problem.value) + ")" : ""}`;
    }
  }

  async function place(values, refusedFeatures, nearest, domain) {
    const jobs = [];
    for (const [name, view] of Object.entries(views.features)) {
      const value = values[name];
      const rows = typeof value === "number" ? [{value: value, refused: refusedFeatures.has(name)}] : [];
      jobs.push(view.data("record", rows).runAsync());
    }
    jobs.push(views.distance.data("record", nearest ? [{distance: nearest.distance, percentile: nearest.percentile}] : []).runAsync());
    if (views.domain) jobs.push(views.domain.data("record", domain ? [{score: domain.score, verdict: domain.verdict}] : []).runAsync());
    await Promise.all(jobs);
  }

  function scoredAnswer(result) {
    const parts = [el("p", {class: "answer"}, "Label ", el("span", {class: "label", id: "answer-label"}, String(result.label)))];
    const decision = typeof result.decision === "number" ? fmt(result.decision)
      : Object.entries(result.decision).map(([label, value]) => `${label} ${fmt(value)}`).join(", ");
    const rows = [["decision", decision]];
    if (result.probability) {
      rows.push(["probability", Object.entries(result.probability).map(([label, value]) => `${label} ${(100 * value).toFixed(1)} %`).join(", ")]);
    } else {
      rows.push(["probability", "none: this version is not calibrated"]);
    }
    const nearest = result.nearest_support;
    rows.push(["nearest support vector", `distance ${fmt(nearest.distance)} (scaled space), class ${nearest.label}, `
      + `percentile ${fmt(nearest.percentile, 3)} among the reference rows`]);
    if (result.domain) rows.push(["domain", `${result.domain.verdict} (score ${fmt(result.domain.score)})`]);
    parts.push(globalThis.rbfView.facts(rows));
    return parts;
  }

  form.addEventListener("submit", async (event) => {
    event.preventDefault();
    answer.replaceChildren();
    for (const field of Object.values(fields)) { field.refusal.textContent = ""; field.wrapper.classList.remove("refused"); }
    const values = record();
    let document;
    try {
      document = await api(path("/view/data/models", page.model, "try"), {method: "POST", body: {records: [values]}});
    } catch (error) {
      showProblem(answer, error, "Not scored");
      return;
    }
    const result = document.results[0];
    answer.append(el("p", {class: "muted"}, `Answered by ${document.model} ${document.version}, bundle ${document.bundle_sha256.slice(0, 16)}...`));
    const refused = new Set();
    if (result.status === "scored") {
      answer.dataset.status = "scored";
      answer.append(...scoredAnswer(result));
      await place(values, refused, result.nearest_support, result.domain);
      return;
    }
    answer.dataset.status = "refused";
    answer.append(el("p", {class: "answer"}, el("span", {class: "label"}, "Refused"), " - each problem is shown next to its field."));
    for (const problem of result.problems) {
      const field = problem.feature !== null ? fields[problem.feature] : undefined;
      if (field) {
        refused.add(problem.feature);
        field.wrapper.classList.add("refused");
        field.refusal.textContent = reasonText(problem);
      } else {
        answer.append(el("p", {class: "problem"}, problem.feature ? `${problem.feature}: ${reasonText(problem)}` : reasonText(problem)));
      }
    }
    await place(values, refused, null, result.domain);
  });
});
