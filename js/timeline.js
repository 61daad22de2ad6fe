// afterfit timeline: every step with its reason; undo, redo and compare two steps (anywidget ES module).
//
// Synced state (from Python): steps, position, can_undo, can_redo, comparison, error.
// Requests (to Python): {kind: "undo"}, {kind: "redo"}, {kind: "compare", i, j} with i < j.
// Closing the comparison sets `comparison` to {} from the page.

/**
 * One timeline step as Python sends it.
 * @typedef {object} StepRow
 * @property {number} index
 * @property {string} kind
 * @property {string} detail
 * @property {string} reason
 * @property {string} time      ISO 8601 text
 * @property {string} formula
 * @property {number|null} n_rows
 * @property {string} tag
 */

/**
 * A comparison of two steps, already formatted by Python.
 * @typedef {object} Comparison
 * @property {number} i
 * @property {number} j
 * @property {string[]} columns
 * @property {string[][]} rows
 * @property {string} [note]
 */

/**
 * The part of an anywidget model this module uses.
 * @typedef {object} Model
 * @property {(name: string) => any} get
 * @property {(name: string, value: any) => void} set
 * @property {(event: string, fn: Function) => void} on
 * @property {(event: string, fn?: Function) => void} off
 * @property {() => void} save_changes
 * @property {(content: object) => void} send
 */

/**
 * Short clock time for the list (the full ISO text goes in the tooltip).
 * @param {string} iso
 * @returns {string}
 */
export function shortTime(iso) {
  const text = String(iso || "");
  const m = /^\d{4}-\d\d-\d\d[T ](\d\d:\d\d:\d\d)/.exec(text);
  return m ? m[1] : text;
}

/**
 * Keep at most two selected steps: a third selection drops the oldest one.
 * @param {number[]} selected  in the order they were picked
 * @param {number} index
 * @param {boolean} on
 * @returns {number[]}
 */
export function pick(selected, index, on) {
  const rest = selected.filter((k) => k !== index);
  if (!on) return rest;
  return [...rest, index].slice(-2);
}

/**
 * @param {Document} doc
 * @param {string} tag
 * @param {Record<string, any>} [attrs]
 * @param {...(Node|null|undefined)} children
 * @returns {HTMLElement}
 */
function h(doc, tag, attrs = {}, ...children) {
  const node = doc.createElement(tag);
  for (const [key, value] of Object.entries(attrs)) {
    if (value === null || value === undefined || value === false) continue;
    if (key === "text") node.textContent = String(value);
    else node.setAttribute(key, value === true ? "" : String(value));
  }
  for (const child of children) if (child) node.append(child);
  return node;
}

/**
 * Draw the timeline into `el` and keep it in step with the model.
 * @param {{model: Model, el: HTMLElement}} ctx
 * @returns {() => void} cleanup
 */
function render({ model, el }) {
  const doc = el.ownerDocument;
  /** @type {number[]} steps ticked for comparison, in the order they were ticked */
  let selected = [];
  let pending = "";

  const button = (/** @type {string} */ action, /** @type {string} */ text) => /** @type {HTMLButtonElement} */ (h(doc, "button", { type: "button", "data-action": action, text }));
  const undo = button("undo", "\u21B6 Undo");
  const redo = button("redo", "Redo \u21B7");
  const compare = button("compare", "Compare selected");
  const hint = h(doc, "span", { class: "afterfit-hint" });
  const list = h(doc, "ol", { class: "afterfit-steps", "aria-label": "Steps" });
  const result = h(doc, "section", { class: "afterfit-compare", "aria-label": "Comparison of two steps", hidden: true });
  const status = h(doc, "p", { class: "afterfit-status", role: "status", "aria-live": "polite" });
  const root = h(
    doc,
    "div",
    { class: "afterfit afterfit-timeline" },
    h(doc, "div", { class: "afterfit-zone-head" }, h(doc, "span", { class: "afterfit-zone-title", text: "Timeline" })),
    h(doc, "div", { class: "afterfit-toolbar", role: "toolbar", "aria-label": "Timeline actions" }, undo, redo, compare, hint),
    list,
    result,
    status,
  );
  el.append(root);

  /** @returns {StepRow[]} */
  const steps = () => {
    const value = model.get("steps");
    return Array.isArray(value) ? value.filter((/** @type {any} */ r) => r && typeof r === "object") : [];
  };

  /** @param {StepRow} step @param {number} position */
  function stepItem(step, position) {
    const index = Number(step.index);
    const current = index === position;
    const undone = index > position;
    const box = /** @type {HTMLInputElement} */ (
      h(doc, "input", {
        type: "checkbox",
        "data-action": "select",
        "data-index": index,
        "aria-label": `Select step ${index} for comparison`,
      })
    );
    box.checked = selected.includes(index);
    const reason = String(step.reason || "");
    const tag = String(step.tag || "");
    const rows = typeof step.n_rows === "number" ? `${step.n_rows} rows` : "";
    return h(
      doc,
      "li",
      {
        class: `afterfit-step${current ? " afterfit-current" : ""}${undone ? " afterfit-undone" : ""}`,
        "data-index": index,
        "aria-current": current ? "step" : null,
        title: step.formula ? String(step.formula) : null,
      },
      box,
      h(doc, "span", { class: "afterfit-step-index", text: `#${index}` }),
      h(doc, "span", { class: "afterfit-step-kind", text: String(step.kind || "") }),
      h(doc, "span", { class: "afterfit-step-detail", text: String(step.detail || "") }),
      reason ? h(doc, "span", { class: "afterfit-step-reason", text: `\u201C${reason}\u201D` }) : null,
      tag ? h(doc, "span", { class: "afterfit-step-tag", text: tag }) : null,
      rows ? h(doc, "span", { class: "afterfit-step-rows", text: rows }) : null,
      h(doc, "time", { class: "afterfit-step-time", datetime: String(step.time || ""), title: String(step.time || ""), text: shortTime(step.time) }),
      current ? h(doc, "span", { class: "afterfit-step-now", text: "\u25C0 current" }) : null,
      undone ? h(doc, "span", { class: "afterfit-step-now", text: "(undone: Redo brings it back)" }) : null,
    );
  }

  function drawControls() {
    undo.disabled = !model.get("can_undo");
    redo.disabled = !model.get("can_redo");
    compare.disabled = selected.length !== 2;
    hint.textContent =
      selected.length === 2
        ? `steps ${Math.min(...selected)} and ${Math.max(...selected)} selected`
        : "tick two steps to compare them";
  }

  function drawStatus() {
    const error = String(model.get("error") || "");
    status.textContent = error || pending;
    status.classList.toggle("afterfit-error", Boolean(error));
  }

  function drawResult() {
    /** @type {Comparison} */
    const c = model.get("comparison") || {};
    const columns = Array.isArray(c.columns) ? c.columns : [];
    const rows = Array.isArray(c.rows) ? c.rows : [];
    if (!rows.length) {
      result.hidden = true;
      result.replaceChildren();
      return;
    }
    const table = h(
      doc,
      "table",
      { class: "afterfit-compare-table" },
      h(doc, "thead", {}, h(doc, "tr", {}, ...columns.map((name) => h(doc, "th", { scope: "col", text: String(name) })))),
      h(doc, "tbody", {}, ...rows.map((row) => h(doc, "tr", {}, ...(Array.isArray(row) ? row : []).map((cell) => h(doc, "td", { text: String(cell) }))))),
    );
    result.replaceChildren(
      h(doc, "div", { class: "afterfit-zone-head" }, h(doc, "span", { class: "afterfit-zone-title", text: `Step ${c.i} compared with step ${c.j}` })),
      table,
    );
    if (c.note) result.append(h(doc, "p", { class: "afterfit-caution", text: String(c.note) }));
    result.append(h(doc, "button", { type: "button", "data-action": "close-compare", text: "Close comparison" }));
    result.hidden = false;
  }

  function draw() {
    const all = steps();
    const position = Number(model.get("position"));
    const known = new Set(all.map((s) => Number(s.index)));
    selected = selected.filter((k) => known.has(k));
    list.replaceChildren(...all.map((s) => stepItem(s, position)));
    if (!all.length) list.append(h(doc, "li", { class: "afterfit-empty", text: "No steps yet." }));
    drawControls();
    drawStatus();
  }

  /** @param {MouseEvent} e */
  function onClick(e) {
    const hit = /** @type {Element|null} */ (e.target);
    const target = /** @type {HTMLButtonElement|null} */ (hit && typeof hit.closest === "function" ? hit.closest("[data-action]") : null);
    if (!target || !root.contains(target) || target.disabled) return;
    const action = target.getAttribute("data-action");
    if (action === "undo" || action === "redo") {
      model.send({ kind: action });
      pending = action === "undo" ? "Undoing\u2026" : "Redoing\u2026";
      drawStatus();
    } else if (action === "compare" && selected.length === 2) {
      const [i, j] = [Math.min(...selected), Math.max(...selected)];
      model.send({ kind: "compare", i, j });
      pending = `Comparing step ${i} with step ${j}\u2026`;
      drawStatus();
    } else if (action === "close-compare") {
      model.set("comparison", {});
      model.save_changes();
      drawResult();
    }
  }

  /** @param {Event} e */
  function onChange(e) {
    const box = /** @type {HTMLInputElement} */ (e.target);
    if (!box || box.getAttribute("data-action") !== "select") return;
    const index = Number(box.getAttribute("data-index"));
    selected = pick(selected, index, box.checked);
    // a third tick unticks the oldest one
    for (const other of /** @type {HTMLInputElement[]} */ (Array.from(list.querySelectorAll("input[data-action=select]")))) {
      other.checked = selected.includes(Number(other.getAttribute("data-index")));
    }
    drawControls();
  }

  root.addEventListener("click", onClick);
  root.addEventListener("change", onChange);

  const onSteps = () => {
    pending = "";
    draw();
  };
  const onComparison = () => {
    pending = "";
    drawResult();
    drawStatus();
  };
  const onError = () => {
    pending = "";
    drawStatus();
  };
  const modelEvents = /** @type {[string, Function][]} */ ([
    ["change:steps", onSteps],
    ["change:position", onSteps],
    ["change:can_undo", drawControls],
    ["change:can_redo", drawControls],
    ["change:comparison", onComparison],
    ["change:error", onError],
  ]);
  for (const [name, fn] of modelEvents) model.on(name, fn);
  draw();
  drawResult();

  return () => {
    root.removeEventListener("click", onClick);
    root.removeEventListener("change", onChange);
    for (const [name, fn] of modelEvents) model.off(name, fn);
    root.remove();
  };
}

export default { render };
