// rbfgate view: what every served page shares. The token is asked for once and kept in this
// tab's sessionStorage; the page sends it as a bearer header on its own requests (no cookies).
"use strict";
(function () {
  const {el} = globalThis.rbfView;
  const TOKEN_KEY = "rbfgate.token";
  const body = document.body;
  const page = {kind: body.dataset.page, model: body.dataset.model || null, version: body.dataset.version || null};

  class Problem extends Error {
    constructor(status, document) {
      super((document && (document.detail || document.title)) || `HTTP ${status}`);
      this.status = status;
      this.document = document || {};
    }
  }

  function path(...parts) {
    return parts.map((part, index) => index === 0 ? part : encodeURIComponent(part)).join("/");
  }

  async function api(url, options) {
    options = options || {};
    const headers = {Accept: "application/json"};
    const token = sessionStorage.getItem(TOKEN_KEY);
    if (token) headers.Authorization = "Bearer " + token;
    let payload;
    if (options.body !== undefined) {
      headers["Content-Type"] = "application/json";
      payload = JSON.stringify(options.body);
    }
    const response = await fetch(url, {method: options.method || "GET", headers: headers, body: payload,
      credentials: "omit", cache: "no-store", redirect: "error"});
    const type = response.headers.get("content-type") || "";
    if (options.blob && response.ok) return response;
    const document = type.includes("json") ? await response.json() : {detail: await response.text()};
    if (!response.ok) throw new Problem(response.status, document);
    return document;
  }

  function showProblem(container, error, what) {
    const document = error instanceof Problem ? error.document : {detail: String(error)};
    const box = el("div", {class: "problem", role: "alert"},
      el("strong", {}, `${what}: ${document.title || "failed"}${error.status ? ` (HTTP ${error.status})` : ""}`),
      document.detail || "");
    container.append(box);
    return box;
  }

  function sessionBar(session) {
    const bar = document.getElementById("session");
    bar.replaceChildren();
    if (!session.tokens) {
      bar.append(el("span", {class: "muted"}, "tokens off: pages are open where the JSON routes are"));
      return;
    }
    if (session.caller) {
      bar.append(el("span", {}, `token ${session.caller.name} (role ${session.caller.role})`),
        el("button", {class: "secondary", type: "button", onclick: () => { sessionStorage.removeItem(TOKEN_KEY); location.reload(); }}, "Forget token"));
      return;
    }
    const input = el("input", {type: "password", name: "token", autocomplete: "off", "aria-label": "token", placeholder: "token"});
    const form = el("form", {class: "token-form", onsubmit: (event) => {
      event.preventDefault();
      if (input.value.trim()) { sessionStorage.setItem(TOKEN_KEY, input.value.trim()); location.reload(); }
    }}, input, el("button", {type: "submit"}, "Use token"));
    bar.append(form);
    if (session.detail && sessionStorage.getItem(TOKEN_KEY)) bar.append(el("span", {class: "refusal"}, session.detail));
  }

  function navigation() {
    const nav = document.getElementById("nav");
    const links = [["models", "/view/", "Models"]];
    if (page.model) {
      const base = path("/view/models", page.model);
      links.push(["timeline", base, "Timeline"], ["try", base + "/try", "Try a record"], ["preview", base + "/preview", "Preview a switch"]);
      if (page.version) links.push(["card", path(base + "/versions", page.version), `Card ${page.version}`]);
    }
    nav.replaceChildren(...links.map(([kind, href, label]) => el("a", {href: href, "aria-current": kind === page.kind ? "page" : null}, label)));
  }

  // Run the page: find out who the caller is, then hand over to the page's own script.
  async function start(run) {
    navigation();
    const main = document.getElementById("main");
    const status = document.getElementById("status");
    let session;
    try {
      session = await api("/view/data/session");
    } catch (error) {
      showProblem(main, error, "The service did not answer");
      body.dataset.ready = "error";
      return;
    }
    sessionBar(session);
    if (session.tokens && !session.caller) {
      status.textContent = "This service needs a token: enter it above (it is kept for this tab only).";
      body.dataset.ready = "token";
      return;
    }
    try {
      await run({main: main, status: status, session: session, page: page});
      status.remove();
      body.dataset.ready = "true";
    } catch (error) {
      status.remove();
      showProblem(main, error, "This page could not be shown");
      body.dataset.ready = "error";
    }
  }

  async function download(url, filename) {
    const response = await api(url, {blob: true});
    const blob = await response.blob();
    const link = el("a", {href: URL.createObjectURL(blob), download: filename});
    document.body.append(link);
    link.click();
    setTimeout(() => { URL.revokeObjectURL(link.href); link.remove(); }, 1000);
  }

  globalThis.rbfClient = {Problem: Problem, api: api, download: download, page: page, path: path, showProblem: showProblem, start: start};
})();
