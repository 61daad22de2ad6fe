// Export bridge view (js/cells.js) on the DOM stub: insert by cell id, the Python fallbacks,
// clipboard and copy box, and what is reported back to Python.
import test from "node:test";
import assert from "node:assert/strict";

import cells, { insertBelowCell, copyText, inJupyterLab } from "../../js/cells.js";
import { makePage, fakeModel, elementsNamed, HOSTILE } from "./dom.mjs";

const CODE = "import statsmodels.formula.api as smf\nfit = smf.wls('load ~ temp', data=df).fit()\n";
const AUDIT = "# Audit\n\n1. start: load ~ temp\n";

/** A notebook shared model like JupyterLab's: cells with ids, insertCell(index, cell). */
function fakeNotebook(ids) {
  const cells = ids.map((id) => ({ id }));
  return {
    cells,
    inserted: [],
    insertCell(index, cell) {
      cells.splice(index, 0, { id: `new-${cells.length}`, ...cell });
      this.inserted.push([index, cell]);
    },
  };
}

const tick = () => new Promise((resolve) => setTimeout(resolve, 0));

function setup({ state = {}, notebook = null, navigator = {}, execCommand = () => false, lab = false } = {}) {
  const { doc, el: page } = makePage({ navigator, execCommand });
  let el = page;
  if (lab) {
    el = doc.createElement("div");
    const nb = doc.createElement("div");
    nb.setAttribute("class", "jp-Notebook");
    nb.append(el);
    page.append(nb);
  }
  const model = fakeModel({ code: CODE, audit: AUDIT, cell_id: "b", status: "", error: "", ...state });
  if (notebook) model.widget_manager = { context: { model: { sharedModel: notebook } } };
  const cleanup = cells.render({ model, el });
  const button = (action) => el.querySelector(`[data-action=${action}]`);
  const status = () => el.querySelector(".afterfit-status").textContent;
  const box = () => el.querySelector(".afterfit-copybox");
  return { doc, el, model, cleanup, button, status, box };
}

test("Insert code below puts a new code cell right after the widget's own cell", () => {
  const notebook = fakeNotebook(["a", "b", "c"]);
  const { button, model, status } = setup({ notebook });
  button("insert").click();
  assert.deepEqual(notebook.inserted, [[2, { cell_type: "code", source: CODE, metadata: { trusted: true } }]]);
  assert.deepEqual(model.sent, [{ kind: "exported", what: "code", path: "cell-id" }]);
  assert.match(status(), /new cell below/);
});

test("without the notebook model the page asks Python to try JupyterLab's commands", () => {
  const { button, model } = setup({ lab: true });
  button("insert").click();
  assert.equal(model.sent.length, 1);
  assert.equal(model.sent[0].kind, "insert");
  assert.equal(model.sent[0].lab, true);
  assert.match(model.sent[0].reason, /does not expose the notebook/);
});

test("an unknown cell id or a failing insertCell falls back to Python, outside JupyterLab too", () => {
  const notebook = fakeNotebook(["a"]);
  const first = setup({ notebook, state: { cell_id: "zz" } });
  first.button("insert").click();
  assert.deepEqual(first.model.sent, [{ kind: "insert", reason: "the widget's cell is not in this notebook", lab: false }]);

  const broken = fakeNotebook(["b"]);
  broken.insertCell = () => {
    throw new Error("read-only notebook");
  };
  const second = setup({ notebook: broken });
  second.button("insert").click();
  assert.match(second.model.sent[0].reason, /read-only notebook/);

  const third = setup({ notebook: fakeNotebook(["b"]), state: { cell_id: "" } });
  third.button("insert").click();
  assert.match(third.model.sent[0].reason, /cell id was not recorded/);
});

test("Python's answers: commands sent, or show the code in a read-only box", () => {
  const { model, status, box, el } = setup();
  model.receive({ kind: "commands_sent" });
  assert.match(status(), /Asked JupyterLab/);
  assert.equal(box().hidden, true);
  model.receive({ kind: "fallback", what: "code", reason: "no ipylab here" });
  assert.equal(box().hidden, false);
  const area = el.querySelector("textarea");
  assert.equal(area.value, CODE);
  assert.ok(area.hasAttribute("readonly"));
  assert.match(box().textContent, /statsmodels code/);
  assert.equal(status(), "no ipylab here");
  model.receive({ kind: "fallback", what: "<script>" }); // unknown: ignored
  model.receive("not an object");
  assert.equal(area.value, CODE);
});

test("Copy audit log uses the clipboard and reports it", async () => {
  const written = [];
  const navigator = { clipboard: { writeText: async (t) => written.push(t) } };
  const { button, model, status } = setup({ navigator });
  button("copy-audit").click();
  await tick();
  assert.deepEqual(written, [AUDIT]);
  assert.deepEqual(model.sent, [{ kind: "exported", what: "audit", path: "clipboard" }]);
  assert.match(status(), /Copied the audit log/);
});

test("an audit log still being prepared is not copied: the status says so", async () => {
  const written = [];
  const navigator = { clipboard: { writeText: async (t) => written.push(t) } };
  const { button, model, status } = setup({ navigator, state: { audit: "" } });
  button("copy-audit").click();
  await tick();
  assert.deepEqual(written, []);
  assert.deepEqual(model.sent, []);
  assert.match(status(), /being prepared/);
});

test("a refused clipboard falls back to select-all and the browser's copy command", async () => {
  const navigator = { clipboard: { writeText: async () => Promise.reject(new Error("denied")) } };
  const { button, model, doc, box, el } = setup({ navigator, execCommand: (name) => name === "copy" });
  button("copy-audit").click();
  await tick();
  assert.equal(box().hidden, false);
  assert.equal(el.querySelector("textarea").value, AUDIT);
  assert.equal(doc.selection, el.querySelector("textarea"), "all the text is selected");
  assert.deepEqual(doc.commands, ["copy"]);
  assert.deepEqual(model.sent, [{ kind: "exported", what: "audit", path: "select-copy" }]);
});

test("with no way to copy, the text stays selected in the box and the page says how to copy", async () => {
  const { button, model, status, box } = setup({ navigator: {} });
  button("copy-audit").click();
  await tick();
  assert.equal(box().hidden, false);
  assert.match(status(), /Ctrl\+C/);
  assert.deepEqual(model.sent, [{ kind: "exported", what: "audit", path: "copy-box" }]);
});

test("Show code opens the box; its Copy button copies what it shows; Close hides it", async () => {
  const written = [];
  const navigator = { clipboard: { writeText: async (t) => written.push(t) } };
  const { button, model, box, el } = setup({ navigator });
  button("show-code").click();
  assert.equal(box().hidden, false);
  assert.equal(el.querySelector("textarea").value, CODE);
  button("copy-box").click();
  await tick();
  assert.deepEqual(written, [CODE]);
  assert.deepEqual(model.sent, [{ kind: "exported", what: "code", path: "clipboard" }]);
  model.update("code", CODE + "# more\n");
  assert.equal(el.querySelector("textarea").value, CODE + "# more\n", "the box follows new code");
  button("close-box").click();
  assert.equal(box().hidden, true);
});

test("status and errors from Python are shown as text; hostile text stays text", () => {
  const { model, status, el } = setup({ state: { code: HOSTILE } });
  model.update("status", "Inserted by JupyterLab's commands");
  assert.equal(status(), "Inserted by JupyterLab's commands");
  model.update("error", HOSTILE);
  assert.equal(status(), HOSTILE);
  model.receive({ kind: "fallback", what: "code", reason: HOSTILE });
  assert.equal(el.querySelector("textarea").value, HOSTILE);
  assert.equal(elementsNamed(el, "img").length, 0);
});

test("nothing to insert is said, not sent", () => {
  const { button, model, status } = setup({ state: { code: "" } });
  button("insert").click();
  assert.deepEqual(model.sent, []);
  assert.match(status(), /no code/);
});

test("cleanup removes the view and its listeners; a late copy result is not reported", async () => {
  let release;
  const navigator = { clipboard: { writeText: () => new Promise((resolve) => (release = resolve)) } };
  const { el, model, cleanup, button } = setup({ navigator });
  const root = el.querySelector(".afterfit-export");
  button("copy-audit").click();
  cleanup();
  release();
  await tick();
  assert.deepEqual(model.sent, []);
  assert.equal(root.listenerCount(), 0);
  assert.equal(model.handlerCount(), 0);
  assert.equal(el.children.length, 0);
});

test("helpers: insertBelowCell never throws, copyText reports how, inJupyterLab looks at the page", async () => {
  assert.deepEqual(insertBelowCell(null, "a", "x"), { ok: false, reason: "this front end does not expose the notebook to widgets" });
  const getterBomb = { get widget_manager() { throw new Error("boom"); } };
  assert.equal(insertBelowCell(getterBomb, "a", "x").ok, false);
  const { doc, el } = makePage({ navigator: {} });
  assert.equal(await copyText(doc, "t", null), "");
  assert.equal(inJupyterLab(el), false);
  const shell = doc.createElement("div");
  shell.setAttribute("class", "jp-LabShell");
  doc.body.append(shell);
  assert.equal(inJupyterLab(el), true);
});
