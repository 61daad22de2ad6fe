// afterfit export bridge: put the study's statsmodels code in a new cell below, copy the audit log
// (anywidget ES module).
//
// Synced state (from Python): code, audit, cell_id, status, error.
// Order of attempts for "Insert code below", most reliable first:
//   1. here, in the page: insert after the widget's own cell, found by the cell id Python recorded
//      at display time (JupyterLab's notebook model; an internal attribute, so guarded). It is the
//      only path that can confirm success, and it does not depend on which cell is active.
//   2. ask Python to run JupyterLab's public commands through ipylab (insert below the active cell,
//      then replace its text); Python cannot see whether that worked, so the page says so.
//   3. a read-only text box with the code and a Copy button (VS Code, classic notebook, other).
// Requests (to Python): {kind: "insert", reason, lab} when path 1 failed;
//   {kind: "exported", what: "code"|"audit", path} to report the path that worked.
// Messages (from Python): {kind: "commands_sent"}; {kind: "fallback", what, reason}.

/**
 * The part of an anywidget model this module uses (`widget_manager` is JupyterLab's when present).
 * @typedef {object} Model
 * @property {(name: string) => any} get
 * @property {(event: string, fn: Function) => void} on
 * @property {(event: string, fn?: Function) => void} off
 * @property {(content: object) => void} send
 * @property {any} [widget_manager]
 */

/**
 * Insert a code cell with `source` right after the cell whose id is `cellId`.
 *
 * Uses the notebook's shared model behind JupyterLab's widget manager, which is not a public
 * anywidget API: every step is checked and any failure is reported, never thrown.
 * @param {Model} model
 * @param {string} cellId
 * @param {string} source
 * @returns {{ok: boolean, reason: string}}
 */
export function insertBelowCell(model, cellId, source) {
  try {
    if (!cellId) return { ok: false, reason: "the widget's cell id was not recorded" };
    const manager = model && model.widget_manager;
    const context = manager && manager.context;
    const notebook = context && context.model && context.model.sharedModel;
    if (!notebook || typeof notebook.insertCell !== "function" || !notebook.cells) {
      return { ok: false, reason: "this front end does not expose the notebook to widgets" };
    }
    const cells = Array.from(notebook.cells);
    const i = cells.findIndex((cell) => cell && cell.id === cellId);
    if (i < 0) return { ok: false, reason: "the widget's cell is not in this notebook" };
    const before = cells.length;
    notebook.insertCell(i + 1, { cell_type: "code", source: String(source), metadata: { trusted: true } });
    const after = Array.from(notebook.cells).length;
    if (after !== before + 1) return { ok: false, reason: "the notebook did not take the new cell" };
    return { ok: true, reason: "" };
  } catch (err) {
    const text = err instanceof Error ? err.message : String(err);
    return { ok: false, reason: `the notebook refused the new cell (${text})` };
  }
}

/**
 * Whether the widget sits in a JupyterLab-style notebook (JupyterLab or Notebook 7).
 * @param {HTMLElement} el
 * @returns {boolean}
 */
export function inJupyterLab(el) {
  const doc = el.ownerDocument;
  return Boolean(
    (el.closest && el.closest(".jp-Notebook, .jp-NotebookPanel")) || (doc && doc.querySelector && doc.querySelector(".jp-LabShell")),
  );
}

/**
 * Copy text: the async clipboard first; else select the text box and ask the browser to copy.
 * @param {Document} doc
 * @param {string} text
 * @param {HTMLTextAreaElement|null} box  a text box holding `text`, for the select-all fallback
 * @returns {Promise<"clipboard"|"select-copy"|"">} how it was copied, "" when it was not
 */
export async function copyText(doc, text, box) {
  const view = doc.defaultView || globalThis;
  const clipboard = view && view.navigator && view.navigator.clipboard;
  if (clipboard && typeof clipboard.writeText === "function") {
    try {
      await clipboard.writeText(text);
      return "clipboard";
    } catch (_err) {
      // denied (no permission, not a secure context, no user gesture): try the older way
    }
  }
  if (box) {
    box.focus();
    box.select();
    try {
      if (typeof doc.execCommand === "function" && doc.execCommand("copy")) return "select-copy";
    } catch (_err) {
      // some browsers throw instead of returning false
    }
  }
  return "";
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

const WHAT = { code: "statsmodels code", audit: "audit log" };

/**
 * Draw the export buttons into `el`.
 * @param {{model: Model, el: HTMLElement}} ctx
 * @returns {() => void} cleanup
 */
function render({ model, el }) {
  const doc = el.ownerDocument;
  /** @type {"code"|"audit"|null} which text the copy box shows */
  let boxWhat = null;
  let closed = false;

  const status = h(doc, "p", { class: "afterfit-status", role: "status", "aria-live": "polite" });
  const boxTitle = h(doc, "p", { class: "afterfit-copybox-title" });
  const area = /** @type {HTMLTextAreaElement} */ (h(doc, "textarea", { readonly: true, rows: "10", spellcheck: "false", class: "afterfit-copybox-text" }));
  const box = h(
    doc,
    "div",
    { class: "afterfit-copybox", hidden: true },
    boxTitle,
    area,
    h(doc, "button", { type: "button", "data-action": "copy-box", text: "Copy" }),
    h(doc, "button", { type: "button", "data-action": "close-box", text: "Close" }),
  );
  const root = h(
    doc,
    "div",
    { class: "afterfit afterfit-export" },
    h(
      doc,
      "div",
      { class: "afterfit-toolbar", role: "toolbar", "aria-label": "Export" },
      h(doc, "button", { type: "button", "data-action": "insert", text: "Insert code below" }),
      h(doc, "button", { type: "button", "data-action": "copy-audit", text: "Copy audit log" }),
      h(doc, "button", { type: "button", "data-action": "show-code", text: "Show code" }),
    ),
    status,
    box,
  );
  el.append(root);

  /** @param {string} text @param {boolean} [bad] */
  function say(text, bad = false) {
    status.textContent = text;
    status.classList.toggle("afterfit-error", bad);
  }

  /** @param {"code"|"audit"} what @param {string} [why] */
  function showBox(what, why) {
    boxWhat = what;
    area.value = String(model.get(what) || "");
    boxTitle.textContent = `${why ? why + " " : ""}Copy the ${WHAT[what]} from here:`;
    box.hidden = false;
    area.focus();
    area.select();
  }

  /** @param {"code"|"audit"} what @param {string} path */
  function report(what, path) {
    if (!closed) model.send({ kind: "exported", what, path });
  }

  function insert() {
    const code = String(model.get("code") || "");
    if (!code) {
      say("There is no code to insert yet.", true);
      return;
    }
    const done = insertBelowCell(model, String(model.get("cell_id") || ""), code);
    if (done.ok) {
      say("Inserted the code in a new cell below this one.");
      report("code", "cell-id");
      return;
    }
    say("Asking JupyterLab to insert the cell\u2026");
    model.send({ kind: "insert", reason: done.reason, lab: inJupyterLab(el) });
  }

  /** @param {"code"|"audit"} what */
  async function copy(what) {
    const text = String(model.get(what) || "");
    if (!text) {
      say(what === "audit"
        ? "The audit log is being prepared after the last change (the specification checks run last); try again in a few seconds."
        : "There is nothing to copy yet.", true);
      return;
    }
    const shown = boxWhat === what && !box.hidden ? area : null;
    const how = await copyText(doc, text, shown);
    if (closed) return;
    if (how) {
      say(`Copied the ${WHAT[what]}${how === "select-copy" ? " (selected text)" : ""}.`);
      report(what, how);
      return;
    }
    if (!shown) {
      showBox(what, "The browser did not allow copying.");
      const again = await copyText(doc, text, area);
      if (closed) return;
      if (again) {
        say(`Copied the ${WHAT[what]} (selected text).`);
        report(what, again);
        return;
      }
    }
    say(`Select the text below and copy it (Ctrl+C, or \u2318C on a Mac).`);
    report(what, "copy-box");
  }

  /** @param {MouseEvent} e */
  function onClick(e) {
    const hit = /** @type {Element|null} */ (e.target);
    const target = hit && typeof hit.closest === "function" ? hit.closest("[data-action]") : null;
    if (!target || !root.contains(target)) return;
    const action = target.getAttribute("data-action");
    if (action === "insert") insert();
    else if (action === "copy-audit") copy("audit");
    else if (action === "show-code") showBox("code");
    else if (action === "copy-box" && boxWhat) copy(boxWhat);
    else if (action === "close-box") {
      box.hidden = true;
      boxWhat = null;
    }
  }

  /** @param {any} msg */
  function onMessage(msg) {
    if (!msg || typeof msg !== "object") return;
    if (msg.kind === "commands_sent") {
      say("Asked JupyterLab to insert the code below the active cell. If no cell appeared, use Show code.");
    } else if (msg.kind === "fallback" && (msg.what === "code" || msg.what === "audit")) {
      showBox(msg.what, "This front end cannot insert cells from a widget.");
      say(msg.reason ? String(msg.reason) : "");
    }
  }

  const onStatus = () => say(String(model.get("error") || model.get("status") || ""), Boolean(model.get("error")));
  const onText = () => {
    if (boxWhat && !box.hidden) area.value = String(model.get(boxWhat) || "");
  };
  const modelEvents = /** @type {[string, Function][]} */ ([
    ["msg:custom", onMessage],
    ["change:status", onStatus],
    ["change:error", onStatus],
    ["change:code", onText],
    ["change:audit", onText],
  ]);
  for (const [name, fn] of modelEvents) model.on(name, fn);
  root.addEventListener("click", onClick);
  onStatus();

  return () => {
    closed = true;
    root.removeEventListener("click", onClick);
    for (const [name, fn] of modelEvents) model.off(name, fn);
    root.remove();
  };
}

export default { render };
