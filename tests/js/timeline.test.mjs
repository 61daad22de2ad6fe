// Timeline view (js/timeline.js) on the DOM stub: steps, undo/redo, selecting and comparing.
import test from "node:test";
import assert from "node:assert/strict";

import timeline, { shortTime, pick } from "../../js/timeline.js";
import { makePage, fakeModel, elementsNamed, HOSTILE } from "./dom.mjs";

function steps() {
  return [
    { index: 0, kind: "start", detail: "load ~ temp", reason: "", time: "2026-12-02T10:00:01.123456", formula: "load ~ temp", n_rows: 180, tag: "" },
    { index: 1, kind: "add", detail: "add C(month)", reason: "", time: "2026-12-02T10:01:05", formula: "load ~ temp + C(month)", n_rows: 180, tag: "stated" },
    { index: 2, kind: "add", detail: "add x2", reason: "probe swap", time: "2026-12-02T10:02:09", formula: "load ~ temp + C(month) + x2", n_rows: 180, tag: "speculative" },
  ];
}

function setup(state = {}) {
  const { el } = makePage();
  const model = fakeModel({ steps: steps(), position: 2, can_undo: true, can_redo: false, comparison: {}, error: "", ...state });
  const cleanup = timeline.render({ model, el });
  const button = (action) => el.querySelector(`[data-action=${action}]`);
  const boxes = () => el.querySelectorAll("input[data-action=select]");
  return { el, model, cleanup, button, boxes };
}

test("every step shows kind, detail, reason and time; the current one is marked", () => {
  const { el } = setup();
  const items = el.querySelectorAll(".afterfit-step");
  assert.equal(items.length, 3);
  assert.equal(items[2].querySelector(".afterfit-step-kind").textContent, "add");
  assert.equal(items[2].querySelector(".afterfit-step-detail").textContent, "add x2");
  assert.equal(items[2].querySelector(".afterfit-step-reason").textContent, "\u201Cprobe swap\u201D");
  assert.equal(items[2].querySelector(".afterfit-step-tag").textContent, "speculative");
  assert.equal(items[0].querySelector("time").textContent, "10:00:01");
  assert.equal(items[0].querySelector("time").getAttribute("title"), "2026-12-02T10:00:01.123456");
  assert.equal(items[2].getAttribute("aria-current"), "step");
  assert.equal(items[1].getAttribute("aria-current"), null);
  assert.match(items[2].textContent, /current/);
  assert.equal(items[2].getAttribute("title"), "load ~ temp + C(month) + x2");
});

test("undo and redo are disabled when not possible and send requests when they are", () => {
  const { button, model, el } = setup();
  assert.equal(button("undo").disabled, false);
  assert.equal(button("redo").disabled, true);
  button("redo").click(); // a disabled button gets no click
  button("undo").click();
  assert.deepEqual(model.sent, [{ kind: "undo" }]);
  assert.match(el.querySelector(".afterfit-status").textContent, /Undoing/);
  // Python answers: position 1, both directions possible now
  model.update("position", 1);
  model.update("can_redo", true);
  assert.equal(button("redo").disabled, false);
  assert.equal(el.querySelector(".afterfit-status").textContent, "");
  const items = el.querySelectorAll(".afterfit-step");
  assert.equal(items[1].getAttribute("aria-current"), "step");
  assert.ok(items[2].classList.contains("afterfit-undone"));
  button("redo").click();
  assert.deepEqual(model.sent.at(-1), { kind: "redo" });
});

test("compare needs exactly two ticked steps; a third tick drops the oldest; i < j is sent", () => {
  const { button, boxes, model } = setup();
  assert.equal(button("compare").disabled, true);
  boxes()[2].click();
  assert.equal(button("compare").disabled, true);
  boxes()[0].click();
  assert.equal(button("compare").disabled, false);
  boxes()[1].click(); // third tick: step 2 (the oldest tick) is dropped
  assert.deepEqual(boxes().map((b) => b.checked), [true, true, false]);
  button("compare").click();
  assert.deepEqual(model.sent, [{ kind: "compare", i: 0, j: 1 }]);
  boxes()[0].click(); // untick
  assert.equal(button("compare").disabled, true);
});

test("a comparison from Python is shown as a table and can be closed", () => {
  const { el, model, button } = setup();
  assert.equal(el.querySelector(".afterfit-compare").hidden, true);
  model.update("comparison", {
    i: 0,
    j: 2,
    columns: ["quantity", "value"],
    rows: [["\u0394AIC", "-12.3"], ["F", "4.5"]],
    note: "nested: the F test applies",
  });
  const section = el.querySelector(".afterfit-compare");
  assert.equal(section.hidden, false);
  assert.match(section.textContent, /Step 0 compared with step 2/);
  assert.deepEqual(section.querySelectorAll("th").map((t) => t.textContent), ["quantity", "value"]);
  assert.deepEqual(section.querySelectorAll("td").map((t) => t.textContent), ["\u0394AIC", "-12.3", "F", "4.5"]);
  assert.match(section.textContent, /nested/);
  button("close-compare").click();
  assert.deepEqual(model.get("comparison"), {});
  assert.equal(model.saved, 1);
  assert.equal(section.hidden, true);
});

test("ticks survive a redraw but vanish with their step", () => {
  const { boxes, model } = setup();
  boxes()[2].click();
  boxes()[1].click();
  model.update("steps", steps());
  assert.deepEqual(boxes().map((b) => b.checked), [false, true, true]);
  model.update("steps", steps().slice(0, 2));
  assert.deepEqual(boxes().map((b) => b.checked), [false, true]);
});

test("hostile reasons, details and comparison cells appear as text only", () => {
  const bad = steps();
  bad[1].reason = HOSTILE;
  bad[1].detail = HOSTILE;
  bad[1].formula = HOSTILE;
  const { el, model } = setup({ steps: bad, error: HOSTILE });
  model.update("comparison", { i: 0, j: 1, columns: [HOSTILE], rows: [[HOSTILE]], note: HOSTILE });
  assert.equal(elementsNamed(el, "img").length, 0);
  assert.equal(el.querySelectorAll(".afterfit-step")[1].querySelector(".afterfit-step-detail").textContent, HOSTILE);
  assert.equal(el.querySelector("td").textContent, HOSTILE);
  assert.equal(el.querySelector(".afterfit-status").textContent, HOSTILE);
});

test("cleanup removes the view and every listener", () => {
  const { el, model, cleanup } = setup();
  const root = el.querySelector(".afterfit-timeline");
  cleanup();
  assert.equal(root.listenerCount(), 0);
  assert.equal(model.handlerCount(), 0);
  assert.equal(el.children.length, 0);
});

test("helpers: short time and the two-step selection", () => {
  assert.equal(shortTime("2026-12-02T10:02:09.5+00:00"), "10:02:09");
  assert.equal(shortTime("yesterday"), "yesterday");
  assert.equal(shortTime(undefined), "");
  assert.deepEqual(pick([], 3, true), [3]);
  assert.deepEqual(pick([3, 1], 2, true), [1, 2]);
  assert.deepEqual(pick([3, 1], 3, false), [1]);
  assert.deepEqual(pick([3], 3, true), [3]);
});
