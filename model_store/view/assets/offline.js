// rbfgate view: the offline model card draws the card document embedded in the file.
"use strict";
(function () {
  const main = document.getElementById("main");
  const card = JSON.parse(document.getElementById("card-data").textContent);
  globalThis.rbfCard.render(main, card, {}).then(
    () => { document.body.dataset.ready = "true"; },
    (error) => {
      main.append(globalThis.rbfView.el("p", {class: "problem"}, `The card could not be drawn: ${error}`));
      document.body.dataset.ready = "error";
      throw error;
    });
})();
