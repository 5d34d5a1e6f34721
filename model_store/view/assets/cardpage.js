// rbfgate view, Model card of one published version.
"use strict";
globalThis.rbfClient.start(async ({main, session, page}) => {
  const {el} = globalThis.rbfView;
  const {api, download, path, showProblem} = globalThis.rbfClient;
  const card = await api(path("/view/data/models", page.model, "versions", page.version, "card"));
  let button;
  if (session.may.download_bundle) {
    const url = path("/models", page.model, "versions", page.version, "bundle");
    button = el("button", {type: "button", id: "download", onclick: () => {
      download(url, `${page.model}-${page.version}.tar`).catch((error) => showProblem(main, error, "Download refused"));
    }}, "Download the bundle");
  } else {
    button = el("span", {class: "muted"}, `Downloading the bundle (it holds training rows) needs role operate or audit${session.tokens ? "" : " and a tokens file"}.`);
  }
  await globalThis.rbfCard.render(main, card, {download: button});
});
