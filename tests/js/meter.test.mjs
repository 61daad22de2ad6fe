// Fit meter view (js/meter.js) on the DOM stub: numbers, SVG marks, legend, cleanup.
import test from "node:test";
import assert from "node:assert/strict";

import meter, { fmt, rmseRange, pathThrough, changeText } from "../../js/meter.js";
import { makePage, fakeModel, elementsNamed, HOSTILE } from "./dom.mjs";

/** Rows shaped like Meter.steps (Python's normalised Study.meter()). */
function rows() {
  const base = { gap: null, terms_added: 0, terms_removed: 0, examined: 0, worse: false, one_se: false, rmse_cv_se: 0.05 };
  return [
    { ...base, step: 0, label: "start", rmse_train: 2.0, rmse_cv: 2.2, delta_cv: null, gap: 0.2 },
    { ...base, step: 1, label: "add C(month)", rmse_train: 1.2, rmse_cv: 1.3, delta_cv: -0.9, terms_added: 1, examined: 9, one_se: true },
    { ...base, step: 2, label: "add x2", rmse_train: 1.15, rmse_cv: 1.32, delta_cv: 0.02, terms_added: 2, examined: 17, worse: true, gap: 0.17 },
  ];
}

function setup(state = {}) {
  const { el } = makePage();
  const model = fakeModel({ steps: rows(), position: 2, error: "", ...state });
  const cleanup = meter.render({ model, el });
  return { el, model, cleanup };
}

test("the current step's numbers, examined count and changed terms are shown as text", () => {
  const { el } = setup();
  assert.equal(el.querySelector(".afterfit-meter-step").textContent, "step 2: add x2");
  assert.equal(el.querySelector(".afterfit-meter-numbers").textContent, "training RMSE 1.15 \u00B7 CV RMSE 1.32 \u00B1 0.05 \u00B7 gap 0.17");
  assert.equal(el.querySelector(".afterfit-examined").textContent, "17 candidates examined \u00B7 since the start: terms added 2, removed 0");
});

test("the dumbbell has a training dot, a CV mark, a whisker of one SE and the gap", () => {
  const { el } = setup();
  const bell = el.querySelector(".afterfit-dumbbell");
  assert.equal(bell.namespaceURI, "http://www.w3.org/2000/svg");
  assert.ok(bell.querySelector(".afterfit-dot-train"));
  assert.ok(bell.querySelector(".afterfit-dot-cv"));
  const whisker = bell.querySelector(".afterfit-whisker");
  const gap = bell.querySelector(".afterfit-gap");
  assert.ok(Number(whisker.getAttribute("x2")) > Number(whisker.getAttribute("x1")));
  assert.ok(Number(gap.getAttribute("x2")) > Number(gap.getAttribute("x1")), "CV error above training error lies to the right");
  assert.match(bell.getAttribute("aria-label"), /Training RMSE 1\.15, cross-validated RMSE 1\.32/);
  // labels sit outside the pair, so a small gap never makes them collide
  const [train, cv] = bell.querySelectorAll(".afterfit-dot-label");
  assert.deepEqual([train.textContent, train.getAttribute("text-anchor")], ["train", "end"]);
  assert.deepEqual([cv.textContent, cv.getAttribute("text-anchor")], ["CV", "start"]);
});

test("the history draws two lines, marks the worse step and the one-SE pick, and the current step", () => {
  const { el } = setup();
  const hist = el.querySelector(".afterfit-history");
  const train = hist.querySelector(".afterfit-line-train").getAttribute("d");
  const cv = hist.querySelector(".afterfit-line-cv").getAttribute("d");
  assert.equal((train.match(/[ML]/g) || []).length, 3);
  assert.equal((cv.match(/[ML]/g) || []).length, 3);
  const worse = hist.querySelectorAll(".afterfit-mark-worse");
  assert.equal(worse.length, 1);
  assert.match(worse[0].textContent, /step 2: CV RMSE got worse by 0\.02/);
  const pick = hist.querySelectorAll(".afterfit-mark-onese");
  assert.equal(pick.length, 1);
  assert.match(pick[0].textContent, /step 1/);
  assert.match(hist.getAttribute("aria-label"), /got worse at step 2\. The one-standard-error rule picks step 1\./);
  // the guide sits on the last point (the current step)
  const now = hist.querySelector(".afterfit-now");
  const lastCv = hist.querySelectorAll(".afterfit-dot-cv").at(-1);
  assert.equal(now.getAttribute("x1"), lastCv.getAttribute("cx"));
  // lower RMSE is drawn lower on the screen (larger y)
  const dots = hist.querySelectorAll(".afterfit-dot-cv").map((d) => Number(d.getAttribute("cy")));
  assert.ok(dots[0] < dots[1], "step 0 (CV 2.2) is above step 1 (CV 1.3)");
  // the legend says in words what shapes mean
  assert.match(el.querySelector(".afterfit-legend").textContent, /CV got worse/);
});

test("position picks the current step; new state redraws", () => {
  const { el, model } = setup({ position: 1 });
  assert.equal(el.querySelector(".afterfit-meter-step").textContent, "step 1: add C(month)");
  model.update("steps", rows().slice(0, 1));
  model.update("position", 0);
  assert.equal(el.querySelector(".afterfit-meter-step").textContent, "step 0: start");
  assert.equal(el.querySelectorAll(".afterfit-mark-worse").length, 0);
  assert.match(el.querySelector(".afterfit-history").getAttribute("aria-label"), /RMSE over 1 step\. .*never got worse/);
});

test("missing CV values break the line instead of drawing through zero", () => {
  const r = rows();
  r[1].rmse_cv = null;
  const { el } = setup({ steps: r });
  const cv = el.querySelector(".afterfit-line-cv").getAttribute("d");
  assert.equal((cv.match(/M/g) || []).length, 2);
  assert.equal((cv.match(/L/g) || []).length, 0);
});

test("no steps and errors are shown as text", () => {
  const { el, model } = setup({ steps: [] });
  assert.match(el.textContent, /No fitted steps yet/);
  model.update("error", HOSTILE);
  assert.equal(el.querySelector(".afterfit-status").textContent, HOSTILE);
  assert.equal(elementsNamed(el, "img").length, 0);
});

test("a hostile step label appears as text in the title, never as an element", () => {
  const r = rows();
  r[2].label = HOSTILE;
  const { el } = setup({ steps: r });
  assert.equal(elementsNamed(el, "img").length, 0);
  assert.ok(el.querySelector(".afterfit-meter-step").textContent.includes(HOSTILE));
  assert.ok(el.querySelector(".afterfit-history").textContent.includes(HOSTILE));
});

test("cleanup removes the view and its model handlers", () => {
  const { el, model, cleanup } = setup();
  cleanup();
  assert.equal(model.handlerCount(), 0);
  assert.equal(el.children.length, 0);
});

test("helpers: number format, padded range, broken paths, change text", () => {
  assert.equal(fmt(1.234567), "1.235");
  assert.equal(fmt(null), "n/a");
  assert.equal(fmt(Infinity), "n/a");
  const [lo, hi] = rmseRange(rows());
  assert.ok(lo < 1.15 && hi > 2.25);
  assert.equal(rmseRange([{ rmse_train: null, rmse_cv: null }]), null);
  const [a, b] = rmseRange([{ rmse_train: 1, rmse_cv: 1, rmse_cv_se: 0 }]);
  assert.ok(a < 1 && b > 1, "a single value still gets a non-empty range");
  assert.equal(pathThrough([[0, 1], null, [2, 3], [4, 5]]), "M0.0 1.0 M2.0 3.0 L4.0 5.0");
  assert.equal(changeText(["a", "b"]), "a, b");
  assert.equal(changeText([]), "none");
  assert.equal(changeText(3), "3");
});
