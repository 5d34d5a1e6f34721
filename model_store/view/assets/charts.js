// rbfgate view: drawing the Vega-Lite specifications built in Python (model_store/view/charts.py),
// and a small DOM builder. No network here: the offline card uses this file as it is.
"use strict";
(function () {
  // el("p", {class: "muted"}, "text", child, ...): text is always a text node, never parsed as HTML.
  function el(tag, attributes, ...children) {
    const node = document.createElement(tag);
    for (const [name, value] of Object.entries(attributes || {})) {
      if (value === null || value === undefined || value === false) continue;
      if (name.startsWith("on")) node.addEventListener(name.slice(2), value);
      else if (name === "value") node.value = value;
      else node.setAttribute(name, value === true ? "" : String(value));
    }
    for (const child of children.flat()) {
      if (child === null || child === undefined || child === false) continue;
      node.append(child instanceof Node ? child : document.createTextNode(String(child)));
    }
    return node;
  }

  function fmt(value, digits) {
    if (value === null || value === undefined) return "-";
    if (typeof value !== "number") return String(value);
    if (Number.isInteger(value)) return String(value);
    return Number(value.toPrecision(digits || 4)).toString();
  }

  function facts(pairs) {
    const list = el("dl", {class: "facts"});
    for (const [term, value] of pairs) {
      if (value === undefined) continue;
      list.append(el("dt", {}, term), el("dd", {}, value instanceof Node ? value : fmt(value)));
    }
    return list;
  }

  // Compile with Vega-Lite, parse keeping expression trees (ast: true) and evaluate them with
  // the CSP-safe interpreter (no eval), render as SVG. Resolves to the Vega view once drawn.
  async function draw(container, spec, name) {
    container.classList.add("chart");
    if (name) container.dataset.chart = name;
    const compiled = vegaLite.compile(spec).spec;
    const runtime = vega.parse(compiled, null, {ast: true});
    const view = new vega.View(runtime, {
      renderer: "svg", container: container, hover: true, expr: globalThis.vegaExpressionInterpreter,
    });
    await view.runAsync();
    container.dataset.drawn = "true";
    return view;
  }

  globalThis.rbfView = {draw: draw, el: el, facts: facts, fmt: fmt};
})();
