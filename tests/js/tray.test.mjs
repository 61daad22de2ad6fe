// Term tray view (js/tray.js) on the DOM stub: drawing, drag-and-drop, keyboard, messages.
import test from "node:test";
import assert from "node:assert/strict";

import tray, { formatP, formatDelta, chipLabel, CAUTION } from "../../js/tray.js";
import { makePage, fakeModel, dragAndDrop, press, makeEvent, elementsNamed, HOSTILE } from "./dom.mjs";

/** Candidates as Python sends them (shape of Tray.candidates). */
function candidates() {
  return [
    { term: "np.log(temp)", label: "log temp", kind: "transform", tag: "evident", sources: ["temp"], p_adjusted: 0.0004, delta_cv: -0.51, grounds: "", note: "" },
    { term: "C(month)", label: "month", kind: "season", tag: "stated", sources: ["month"], p_adjusted: 0.02, delta_cv: -0.2, grounds: "declared period 12", note: "" },
    { term: "x2", label: "x2", kind: "variable", tag: "speculative", sources: ["x2"], p_adjusted: 0.4, delta_cv: 0.013, grounds: "", note: "" },
    { term: "temp", label: "temp", kind: "variable", tag: "stated", sources: ["temp"], p_adjusted: null, delta_cv: null, grounds: "", note: "" },
  ];
}

function setup(state = {}) {
  const { doc, el } = makePage();
  const model = fakeModel({ candidates: candidates(), terms: ["temp"], formula: "load ~ temp", error: "", ...state });
  const cleanup = tray.render({ model, el });
  const chips = () => el.querySelectorAll(".afterfit-chip");
  const chip = (term) => chips().find((c) => c.getAttribute("data-term") === term);
  const modelTerms = () => el.querySelectorAll(".afterfit-term");
  const strip = el.querySelector("[data-zone=model]");
  const trayZone = el.querySelector("[data-zone=tray]");
  return { doc, el, model, cleanup, chips, chip, modelTerms, strip, trayZone };
}

test("chips follow the candidates order, leave out model terms, and show label, tag and evidence", () => {
  const { chips, modelTerms, el } = setup();
  assert.deepEqual(chips().map((c) => c.getAttribute("data-term")), ["np.log(temp)", "C(month)", "x2"]);
  assert.deepEqual(modelTerms().map((t) => t.getAttribute("data-term")), ["temp"]);
  const first = chips()[0];
  assert.match(first.textContent, /log temp/);
  assert.match(first.textContent, /evident/);
  assert.match(first.textContent, /<0\.001/);
  assert.match(first.textContent, /\u22120\.510/);
  assert.equal(first.getAttribute("tabindex"), "0");
  assert.equal(first.getAttribute("draggable"), "true");
  assert.equal(first.getAttribute("role"), "listitem");
  assert.equal(first.getAttribute("aria-label"), "log temp, evident, adjusted p <0.001, change in cross-validated RMSE \u22120.510");
  assert.ok(first.classList.contains("afterfit-tag-evident"));
  // a shape cue besides colour: each tag has its own mark
  const marks = chips().map((c) => c.querySelector(".afterfit-tag-mark").textContent);
  assert.equal(new Set(marks).size, 3);
  // every chip and term has a visible button as the keyboard/pointer alternative to dragging
  assert.deepEqual(chips().map((c) => c.querySelector("button").textContent), ["Add", "Add", "Add"]);
  assert.equal(modelTerms()[0].querySelector("button").textContent, "Remove");
  assert.equal(el.querySelector(".afterfit-caution").textContent, CAUTION);
  assert.match(CAUTION, /screening evidence/);
  assert.equal(el.querySelector(".afterfit-chips").getAttribute("role"), "list");
});

test("dragging a stated chip onto the model strip asks Python to add it", () => {
  const { chip, strip, model } = setup();
  const { over, drop, dataTransfer } = dragAndDrop(chip("C(month)"), strip);
  assert.equal(dataTransfer.getData("text/plain"), "C(month)");
  assert.ok(over.defaultPrevented, "dragover must be cancelled or the browser refuses the drop");
  assert.ok(drop.defaultPrevented);
  assert.deepEqual(model.sent, [{ kind: "add", term: "C(month)", reason: null }]);
});

test("a drop on a child of the strip (a term pill) still counts as a drop on the strip", () => {
  const { chip, modelTerms, model } = setup();
  dragAndDrop(chip("np.log(temp)"), modelTerms()[0]);
  assert.deepEqual(model.sent, [{ kind: "add", term: "np.log(temp)", reason: null }]);
});

test("a speculative chip asks for a reason inline: Enter confirms, an empty reason is refused", () => {
  const { chip, strip, model, el, doc } = setup();
  dragAndDrop(chip("x2"), strip);
  assert.deepEqual(model.sent, [], "nothing is sent before a reason is given");
  const prompt = el.querySelector(".afterfit-reason");
  assert.equal(prompt.hidden, false);
  const input = prompt.querySelector("input");
  assert.equal(doc.activeElement, input, "the reason box takes the focus");
  assert.match(prompt.textContent, /speculative/);

  press(input, "Enter");
  assert.deepEqual(model.sent, []);
  assert.match(prompt.textContent, /needs a reason/);

  input.value = "  suspected drift of\n the probe  ";
  const enter = press(input, "Enter");
  assert.ok(enter.defaultPrevented);
  assert.deepEqual(model.sent, [{ kind: "add", term: "x2", reason: "suspected drift of the probe" }]);
  assert.equal(prompt.hidden, true);
  assert.match(el.querySelector(".afterfit-status").textContent, /Adding x2/);
});

test("Escape cancels the reason prompt and returns the focus to the chip", () => {
  const { chip, model, el, doc } = setup();
  chip("x2").focus();
  press(chip("x2"), "Enter");
  const input = el.querySelector(".afterfit-reason input");
  assert.equal(doc.activeElement, input);
  input.value = "half a thought";
  press(input, "Escape");
  assert.equal(el.querySelector(".afterfit-reason").hidden, true);
  assert.deepEqual(model.sent, []);
  assert.equal(doc.activeElement, chip("x2"));
});

test("the reason prompt's buttons confirm and cancel too", () => {
  const { chip, model, el } = setup();
  chip("x2").querySelector("button").click();
  const input = el.querySelector(".afterfit-reason input");
  input.value = "probe swap in spring";
  el.querySelector("[data-action=reason-ok]").click();
  assert.deepEqual(model.sent, [{ kind: "add", term: "x2", reason: "probe swap in spring" }]);
  chip("x2").querySelector("button").click();
  el.querySelector("[data-action=reason-cancel]").click();
  assert.equal(model.sent.length, 1);
});

test("dragging a model term back to the tray asks Python to remove it", () => {
  const { modelTerms, trayZone, model } = setup();
  const { drop } = dragAndDrop(modelTerms()[0], trayZone);
  assert.ok(drop.defaultPrevented);
  assert.deepEqual(model.sent, [{ kind: "remove", term: "temp" }]);
});

test("drops that mean nothing are ignored", () => {
  const { chip, modelTerms, strip, trayZone, model } = setup();
  dragAndDrop(modelTerms()[0], strip); // a model term dropped back on the strip
  dragAndDrop(chip("C(month)"), trayZone); // a chip dropped back on the tray
  const dataTransfer = { getData: () => "rm -rf /", setData() {}, dropEffect: "" };
  strip.dispatchEvent(makeEvent("drop", { dataTransfer })); // text dragged in from elsewhere
  assert.deepEqual(model.sent, []);
});

test("keyboard: Enter or Space on a chip adds, on a model term removes; Enter on a button is its click", () => {
  const { chip, modelTerms, model } = setup();
  const e1 = press(chip("np.log(temp)"), "Enter");
  assert.ok(e1.defaultPrevented);
  press(chip("C(month)"), " ");
  press(modelTerms()[0], "Enter");
  press(chip("np.log(temp)"), "a"); // other keys do nothing
  // keydown on the inner button bubbles to the chip; it must not add a second time
  press(chip("C(month)").querySelector("button"), "Enter");
  assert.deepEqual(model.sent, [
    { kind: "add", term: "np.log(temp)", reason: null },
    { kind: "add", term: "C(month)", reason: null },
    { kind: "remove", term: "temp" },
  ]);
});

test("Add and Remove buttons send the same requests as dragging", () => {
  const { chip, modelTerms, model } = setup();
  chip("C(month)").querySelector("button").click();
  modelTerms()[0].querySelector("button").click();
  assert.deepEqual(model.sent, [
    { kind: "add", term: "C(month)", reason: null },
    { kind: "remove", term: "temp" },
  ]);
});

test("new state from Python redraws the lists, clears the pending note and keeps keyboard focus", () => {
  const { chip, modelTerms, model, el, doc } = setup();
  chip("C(month)").focus();
  press(chip("C(month)"), "Enter");
  assert.match(el.querySelector(".afterfit-status").textContent, /Adding month/);
  model.update("terms", ["temp", "C(month)"]);
  assert.deepEqual(modelTerms().map((t) => t.getAttribute("data-term")), ["temp", "C(month)"]);
  assert.equal(chip("C(month)"), undefined);
  assert.equal(el.querySelector(".afterfit-status").textContent, "");
  assert.equal(doc.activeElement.getAttribute("data-term"), "C(month)", "focus follows the term to the strip");
});

test("an error from Python is shown as text", () => {
  const { model, el } = setup();
  model.update("error", "Add x2: a speculative term needs a reason");
  const status = el.querySelector(".afterfit-status");
  assert.equal(status.textContent, "Add x2: a speculative term needs a reason");
  assert.ok(status.classList.contains("afterfit-error"));
  model.update("error", "");
  assert.ok(!status.classList.contains("afterfit-error"));
});

test("hostile names, labels, notes and formula appear as text, never as elements", () => {
  const { el, chip, modelTerms, model } = setup({
    candidates: [{ term: HOSTILE, label: HOSTILE, kind: "variable", tag: HOSTILE, p_adjusted: 0.5, delta_cv: 0.1, grounds: HOSTILE, note: HOSTILE }],
    terms: [HOSTILE + "2"],
    formula: `y ~ ${HOSTILE}`,
    error: HOSTILE,
  });
  assert.equal(elementsNamed(el, "img").length, 0);
  assert.ok(el.textContent.includes(HOSTILE));
  assert.equal(chip(HOSTILE).getAttribute("data-term"), HOSTILE);
  assert.ok(chip(HOSTILE).classList.contains("afterfit-tag-other"), "an unknown tag never becomes a class name");
  assert.equal(modelTerms()[0].querySelector(".afterfit-term-text").textContent, HOSTILE + "2");
  chip(HOSTILE).querySelector("button").click();
  assert.deepEqual(model.sent, [{ kind: "add", term: HOSTILE, reason: null }]);
});

test("cleanup removes the view and every listener it added", () => {
  const { el, model, cleanup } = setup();
  const root = el.querySelector(".afterfit-tray");
  assert.ok(root.listenerCount() > 0);
  assert.ok(model.handlerCount() > 0);
  cleanup();
  assert.equal(root.listenerCount(), 0);
  assert.equal(model.handlerCount(), 0);
  assert.equal(el.children.length, 0);
});

test("empty lists say so instead of showing nothing", () => {
  const { el } = setup({ candidates: [], terms: [] });
  assert.match(el.querySelector(".afterfit-chips").textContent, /No candidate terms/);
  assert.match(el.querySelector(".afterfit-terms").textContent, /No terms/);
});

test("number formats for the evidence line", () => {
  assert.equal(formatP(0.0004), "<0.001");
  assert.equal(formatP(0.04567), "0.046");
  assert.equal(formatP(null), "n/a");
  assert.equal(formatP(NaN), "n/a");
  assert.equal(formatDelta(-0.1234), "\u22120.123");
  assert.equal(formatDelta(0.5), "+0.500");
  assert.equal(formatDelta(0), "0");
  assert.equal(formatDelta(undefined), "n/a");
  assert.equal(chipLabel({ term: "t", label: "", tag: "odd", p_adjusted: 1, delta_cv: 0 }), "t, odd, adjusted p 1.000, change in cross-validated RMSE 0");
});
