// afterfit term tray: candidate chips and the model strip (anywidget ES module, no build step).
//
// Synced state (from Python): candidates, terms, formula, error.
// Requests (to Python): {kind: "add", term, reason} and {kind: "remove", term}.
// Everything from the data (terms, labels, notes, reasons) goes into the page as textContent or
// attribute values, never as markup.

/**
 * @typedef {object} Candidate
 * @property {string} term         formula text of the term
 * @property {string} label        short readable name
 * @property {string} kind
 * @property {string} tag          "stated" | "evident" | "speculative"
 * @property {string[]} [sources]
 * @property {number|null} [p_adjusted]
 * @property {number|null} [delta_cv]
 * @property {string} [grounds]
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
 * @property {(content: object, callbacks?: any, buffers?: ArrayBuffer[]) => void} send
 */

/**
 * Tag styling: each tag has a distinct mark (shape) and word, not only a colour.
 * @type {Readonly<Record<string, {mark: string, word: string, hint: string}>>}
 */
export const TAGS = Object.freeze({
  stated: { mark: "\u25A0", word: "stated", hint: "you declared grounds for it" },
  evident: { mark: "\u25B2", word: "evident", hint: "the residuals show it after multiplicity control" },
  speculative: { mark: "\u25C7", word: "speculative", hint: "neither; adding it asks for a reason" },
});

export const CAUTION =
  "Candidate p-values are screening evidence from the same data, not confirmation. " +
  "Speculative terms are recorded as such in the audit log.";

/**
 * Format an adjusted p-value for a chip.
 * @param {number|null|undefined} p
 * @returns {string}
 */
export function formatP(p) {
  if (typeof p !== "number" || !Number.isFinite(p)) return "n/a";
  if (p < 0.001) return "<0.001";
  return p.toFixed(3);
}

/**
 * Format a change in CV RMSE with an explicit sign (negative = better).
 * @param {number|null|undefined} d
 * @returns {string}
 */
export function formatDelta(d) {
  if (typeof d !== "number" || !Number.isFinite(d)) return "n/a";
  if (d === 0) return "0";
  const size = Math.abs(d).toPrecision(3);
  return (d < 0 ? "\u2212" : "+") + size;
}

/**
 * The evidence line shown on a chip.
 * @param {Candidate} c
 * @returns {string}
 */
export function evidenceText(c) {
  return `p adj ${formatP(c.p_adjusted)} \u00B7 \u0394CV ${formatDelta(c.delta_cv)}`;
}

/**
 * What a screen reader announces for a chip: label, tag and evidence.
 * @param {Candidate} c
 * @returns {string}
 */
export function chipLabel(c) {
  const tag = TAGS[c.tag] ? TAGS[c.tag].word : String(c.tag || "untagged");
  return (
    `${c.label || c.term}, ${tag}, adjusted p ${formatP(c.p_adjusted)}, ` +
    `change in cross-validated RMSE ${formatDelta(c.delta_cv)}`
  );
}

/**
 * Create an element; `text` sets textContent, `value` the value property, other keys attributes.
 * @param {Document} doc
 * @param {string} tag
 * @param {Record<string, any>} [attrs]
 * @param {...(Node|null|undefined)} children
 * @returns {HTMLElement}
 */
function h(doc, tag, attrs = {}, ...children) {
  const node = /** @type {HTMLInputElement} */ (doc.createElement(tag));
  for (const [key, value] of Object.entries(attrs)) {
    if (value === null || value === undefined || value === false) continue;
    if (key === "text") node.textContent = String(value);
    else if (key === "value") node.value = String(value);
    else node.setAttribute(key, value === true ? "" : String(value));
  }
  for (const child of children) if (child) node.append(child);
  return node;
}

/** @param {any} v @returns {any[]} */
const asList = (v) => (Array.isArray(v) ? v : []);

/**
 * Draw the tray into `el` and keep it in step with the model.
 * @param {{model: Model, el: HTMLElement}} ctx
 * @returns {() => void} cleanup: removes every listener this view added
 */
function render({ model, el }) {
  const doc = el.ownerDocument;
  /** @type {string|null} term waiting for a reason (speculative), or null */
  let prompting = null;
  /** text shown while Python works on a request */
  let pending = "";

  const root = h(doc, "div", { class: "afterfit afterfit-tray" });
  const caution = h(doc, "p", { class: "afterfit-caution", text: CAUTION });

  const stripHead = h(doc, "div", { class: "afterfit-zone-head" });
  const termList = h(doc, "ul", { class: "afterfit-terms", role: "list", "aria-label": "Terms in the model" });
  const promptText = h(doc, "span", { class: "afterfit-reason-text" });
  const input = /** @type {HTMLInputElement} */ (h(doc, "input", {
    type: "text",
    class: "afterfit-reason-input",
    maxlength: "300",
    placeholder: "one line: why this term?",
    "data-action": "reason-input",
  }));
  const promptHint = h(doc, "span", { class: "afterfit-hint", "aria-live": "polite" });
  const prompt = h(
    doc,
    "div",
    { class: "afterfit-reason", hidden: true },
    promptText,
    input,
    h(doc, "button", { type: "button", "data-action": "reason-ok", text: "Add with this reason" }),
    h(doc, "button", { type: "button", "data-action": "reason-cancel", text: "Cancel" }),
    promptHint,
  );
  const strip = h(
    doc,
    "section",
    { class: "afterfit-strip", "data-zone": "model", "aria-label": "Model strip: drop a candidate here to add it" },
    stripHead,
    termList,
    prompt,
  );

  const chipList = h(doc, "ul", { class: "afterfit-chips", role: "list", "aria-label": "Candidate terms" });
  const tray = h(
    doc,
    "section",
    { class: "afterfit-candidates", "data-zone": "tray", "aria-label": "Term tray: drop a model term here to remove it" },
    h(doc, "div", { class: "afterfit-zone-head" }, h(doc, "span", { class: "afterfit-zone-title", text: "Term tray" })),
    chipList,
  );
  const status = h(doc, "p", { class: "afterfit-status", role: "status", "aria-live": "polite" });
  root.append(caution, strip, tray, status);
  el.append(root);

  /** @returns {Candidate[]} */
  const candidates = () => asList(model.get("candidates"));
  /** @returns {string[]} */
  const terms = () => asList(model.get("terms")).map(String);
  /** @param {string} term */
  const findCandidate = (term) => candidates().find((c) => c && c.term === term);

  /** @param {string} term */
  function termItem(term) {
    return h(
      doc,
      "li",
      {
        class: "afterfit-term",
        role: "listitem",
        tabindex: "0",
        draggable: "true",
        "data-term": term,
        "data-item": "term",
        "aria-label": `${term}, in the model. Enter removes it.`,
      },
      h(doc, "span", { class: "afterfit-term-text", text: term }),
      h(doc, "button", {
        type: "button",
        class: "afterfit-remove",
        "data-action": "remove",
        "aria-label": `Remove ${term} from the model`,
        text: "Remove",
      }),
    );
  }

  /** @param {Candidate} c */
  function chipItem(c) {
    const tag = TAGS[c.tag] ? c.tag : "other";
    const look = TAGS[c.tag] || { mark: "?", word: String(c.tag || "untagged"), hint: "" };
    const title = [look.hint, c.grounds, c.note].filter((t) => t).join(" \u2014 ");
    return h(
      doc,
      "li",
      {
        class: `afterfit-chip afterfit-tag-${tag}`,
        role: "listitem",
        tabindex: "0",
        draggable: "true",
        "data-term": c.term,
        "data-item": "chip",
        "data-tag": tag,
        "aria-label": chipLabel(c),
        title: title || null,
      },
      h(doc, "span", { class: "afterfit-tag-mark", "aria-hidden": "true", text: look.mark }),
      h(doc, "span", { class: "afterfit-chip-label", text: c.label || c.term }),
      h(doc, "span", { class: "afterfit-tag-word", text: look.word }),
      h(doc, "span", { class: "afterfit-evidence", text: evidenceText(c) }),
      h(doc, "button", {
        type: "button",
        class: "afterfit-add",
        "data-action": "add",
        "aria-label": `Add ${c.label || c.term} to the model`,
        text: "Add",
      }),
    );
  }

  /** @param {string} term @returns {HTMLElement|null} */
  function itemFor(term) {
    for (const node of root.querySelectorAll("[data-term]")) {
      if (node.getAttribute("data-term") === term) return /** @type {HTMLElement} */ (node);
    }
    return null;
  }

  function drawStatus() {
    const error = String(model.get("error") || "");
    status.textContent = error || pending;
    status.classList.toggle("afterfit-error", Boolean(error));
  }

  function draw() {
    const active = doc.activeElement;
    const had = active && root.contains(active) ? active.closest("[data-term]") : null;
    const focusTerm = had ? had.getAttribute("data-term") : null;
    const focusList = had ? had.parentNode : null;

    const inModel = terms();
    const held = new Set(inModel);
    const formula = String(model.get("formula") || "");
    stripHead.replaceChildren(h(doc, "span", { class: "afterfit-zone-title", text: "Model strip" }));
    if (formula) stripHead.append(h(doc, "code", { class: "afterfit-formula", text: formula }));
    termList.replaceChildren(...inModel.map(termItem));
    if (!inModel.length) {
      termList.append(h(doc, "li", { class: "afterfit-empty", text: "No terms: drag a candidate here or press its Add button." }));
    }
    const shown = candidates().filter((c) => c && typeof c.term === "string" && !held.has(c.term));
    chipList.replaceChildren(...shown.map(chipItem));
    if (!shown.length) {
      chipList.append(h(doc, "li", { class: "afterfit-empty", text: "No candidate terms to propose." }));
    }
    if (prompting !== null && !shown.some((c) => c.term === prompting)) closePrompt(false);
    drawStatus();

    // keep keyboard users where they were: the same term, or the first item of the same list
    if (focusTerm !== null && !(doc.activeElement && root.contains(doc.activeElement))) {
      const again = itemFor(focusTerm);
      const next = again || (focusList && focusList.querySelector("[data-term]"));
      if (next) next.focus();
    }
  }

  /** @param {string} term */
  function requestAdd(term) {
    const c = findCandidate(term);
    if (!c || terms().includes(term)) return;
    if (c.tag === "speculative") {
      openPrompt(c);
      return;
    }
    model.send({ kind: "add", term, reason: null });
    pending = `Adding ${c.label || term}\u2026`;
    drawStatus();
  }

  /** @param {string} term */
  function requestRemove(term) {
    if (!terms().includes(term)) return;
    model.send({ kind: "remove", term });
    pending = `Removing ${term}\u2026`;
    drawStatus();
  }

  /** @param {Candidate} c */
  function openPrompt(c) {
    prompting = c.term;
    promptText.textContent = `${c.label || c.term} is speculative: give a one-line reason (it goes into the audit log).`;
    input.value = "";
    input.setAttribute("aria-label", `Reason for adding ${c.label || c.term}`);
    promptHint.textContent = "Enter adds it, Escape cancels.";
    prompt.hidden = false;
    input.focus();
  }

  /** @param {boolean} refocus */
  function closePrompt(refocus) {
    const term = prompting;
    prompting = null;
    prompt.hidden = true;
    promptHint.textContent = "";
    if (refocus && term !== null) {
      const chip = itemFor(term);
      if (chip) chip.focus();
    }
  }

  function confirmReason() {
    if (prompting === null) return;
    const reason = String(input.value || "").replace(/\s+/g, " ").trim();
    if (!reason) {
      promptHint.textContent = "A speculative term needs a reason before it is added.";
      input.focus();
      return;
    }
    const c = findCandidate(prompting);
    model.send({ kind: "add", term: prompting, reason });
    pending = `Adding ${(c && c.label) || prompting}\u2026`;
    closePrompt(false);
    drawStatus();
  }

  /**
   * The element that received an event, when it is an element.
   * @param {Event} e
   * @returns {Element|null}
   */
  const targetOf = (e) => {
    const t = /** @type {Element|null} */ (e.target);
    return t && typeof t.closest === "function" ? t : null;
  };
  /** @param {Event} e @returns {Element|null} */
  const zoneOf = (e) => {
    const t = targetOf(e);
    return t ? t.closest("[data-zone]") : null;
  };

  function clearDragMarks() {
    for (const node of root.querySelectorAll(".afterfit-over, .afterfit-dragging")) {
      node.classList.remove("afterfit-over");
      node.classList.remove("afterfit-dragging");
    }
  }

  /** @param {MouseEvent} e */
  function onClick(e) {
    const hit = targetOf(e);
    const button = hit ? hit.closest("[data-action]") : null;
    if (!button || !root.contains(button)) return;
    const action = button.getAttribute("data-action");
    const item = button.closest("[data-term]");
    const term = item ? item.getAttribute("data-term") : null;
    if (action === "add" && term !== null) requestAdd(term);
    else if (action === "remove" && term !== null) requestRemove(term);
    else if (action === "reason-ok") confirmReason();
    else if (action === "reason-cancel") closePrompt(true);
  }

  /** @param {KeyboardEvent} e */
  function onKeydown(e) {
    const target = /** @type {HTMLElement} */ (e.target);
    if (target === input) {
      if (e.key === "Enter") {
        e.preventDefault();
        confirmReason();
      } else if (e.key === "Escape") {
        e.preventDefault();
        closePrompt(true);
      }
      return;
    }
    // only the item itself: Enter on its inner button is that button's click
    if (!target || !target.getAttribute || !target.hasAttribute("data-item")) return;
    if (e.key !== "Enter" && e.key !== " ") return;
    e.preventDefault();
    const term = target.getAttribute("data-term") || "";
    if (target.getAttribute("data-item") === "chip") requestAdd(term);
    else requestRemove(term);
  }

  /** @param {DragEvent} e */
  function onDragStart(e) {
    const hit = targetOf(e);
    const item = hit ? hit.closest("[data-term]") : null;
    if (!item || !e.dataTransfer) return;
    e.dataTransfer.setData("text/plain", item.getAttribute("data-term") || "");
    e.dataTransfer.effectAllowed = "move";
    item.classList.add("afterfit-dragging");
  }

  /** @param {DragEvent} e */
  function onDragOver(e) {
    const zone = zoneOf(e);
    if (!zone) return;
    e.preventDefault(); // without this the browser refuses the drop
    if (e.dataTransfer) e.dataTransfer.dropEffect = "move";
    zone.classList.add("afterfit-over");
  }

  /** @param {DragEvent} e */
  function onDragLeave(e) {
    const zone = zoneOf(e);
    const into = /** @type {Node|null} */ (e.relatedTarget);
    if (zone && !(into && zone.contains(into))) zone.classList.remove("afterfit-over");
  }

  /** @param {DragEvent} e */
  function onDrop(e) {
    const zone = zoneOf(e);
    if (!zone) return;
    e.preventDefault();
    const term = e.dataTransfer ? e.dataTransfer.getData("text/plain") : "";
    clearDragMarks();
    if (!term) return;
    // the zone decides: a candidate dropped on the strip is added, a model term dropped on the
    // tray is removed; anything else (text dragged from elsewhere, a drop back home) is ignored
    if (zone.getAttribute("data-zone") === "model") requestAdd(term);
    else if (zone.getAttribute("data-zone") === "tray") requestRemove(term);
  }

  const listeners = /** @type {[string, EventListener][]} */ ([
    ["click", onClick],
    ["keydown", onKeydown],
    ["dragstart", onDragStart],
    ["dragover", onDragOver],
    ["dragleave", onDragLeave],
    ["drop", onDrop],
    ["dragend", clearDragMarks],
  ]);
  for (const [type, fn] of listeners) root.addEventListener(type, fn);

  const onData = () => {
    pending = "";
    draw();
  };
  const onError = () => {
    pending = "";
    drawStatus();
  };
  const modelEvents = /** @type {[string, Function][]} */ ([
    ["change:candidates", onData],
    ["change:terms", onData],
    ["change:formula", onData],
    ["change:error", onError],
  ]);
  for (const [name, fn] of modelEvents) model.on(name, fn);

  draw();

  return () => {
    for (const [type, fn] of listeners) root.removeEventListener(type, fn);
    for (const [name, fn] of modelEvents) model.off(name, fn);
    root.remove();
  };
}

export default { render };
