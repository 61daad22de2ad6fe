// A tiny DOM stub and a fake anywidget model for `node --test` (no npm dependencies).
//
// Only what afterfit's views use is here. `innerHTML` and friends throw, so a test fails loudly
// if a module ever builds markup from strings.

const SVG_NS = "http://www.w3.org/2000/svg";

class StubNode {
  /** @param {StubDocument} doc */
  constructor(doc) {
    this.ownerDocument = doc;
    /** @type {StubElement|null} */
    this.parentNode = null;
  }

  remove() {
    if (this.parentNode) this.parentNode.removeChild(this);
  }

  get isConnected() {
    /** @type {any} */
    let node = this;
    while (node.parentNode) node = node.parentNode;
    return node === this.ownerDocument.documentElement;
  }
}

class StubText extends StubNode {
  constructor(doc, data) {
    super(doc);
    this.nodeType = 3;
    this.data = String(data);
  }

  get textContent() {
    return this.data;
  }

  set textContent(v) {
    this.data = String(v);
  }
}

/** Parse "a.b[c='d'] .e, f" into groups of descendant chains of compound selectors. */
function parseSelector(selector) {
  const groups = [];
  let chain = [];
  let word = "";
  let depth = 0;
  const flush = () => {
    if (word) chain.push(parseCompound(word));
    word = "";
  };
  for (const ch of selector) {
    if (ch === "[") depth += 1;
    if (ch === "]") depth -= 1;
    if (depth === 0 && ch === ",") {
      flush();
      groups.push(chain);
      chain = [];
    } else if (depth === 0 && /\s/.test(ch)) flush();
    else word += ch;
  }
  flush();
  groups.push(chain);
  return groups.filter((g) => g.length);
}

function parseCompound(text) {
  const parts = { tag: null, classes: [], ids: [], attrs: [] };
  const re = /([a-zA-Z][\w-]*)|\.([\w-]+)|#([\w-]+)|\[([\w-]+)(?:=(?:"([^"]*)"|'([^']*)'|([^\]]*)))?\]/g;
  let m;
  let used = 0;
  while ((m = re.exec(text)) !== null) {
    if (m.index !== used) throw new Error(`selector not supported by the stub: ${text}`);
    used = re.lastIndex;
    if (m[1]) parts.tag = m[1].toLowerCase();
    else if (m[2]) parts.classes.push(m[2]);
    else if (m[3]) parts.ids.push(m[3]);
    else parts.attrs.push([m[4], m[5] ?? m[6] ?? m[7] ?? null]);
  }
  if (used !== text.length) throw new Error(`selector not supported by the stub: ${text}`);
  return parts;
}

function matchesCompound(el, c) {
  if (c.tag && el.localName !== c.tag) return false;
  for (const cls of c.classes) if (!el.classList.contains(cls)) return false;
  for (const id of c.ids) if (el.getAttribute("id") !== id) return false;
  for (const [name, value] of c.attrs) {
    if (!el.hasAttribute(name)) return false;
    if (value !== null && el.getAttribute(name) !== value) return false;
  }
  return true;
}

function matchesChain(el, chain) {
  let i = chain.length - 1;
  if (!matchesCompound(el, chain[i])) return false;
  let node = el.parentNode;
  i -= 1;
  while (i >= 0 && node && node instanceof StubElement) {
    if (matchesCompound(node, chain[i])) i -= 1;
    node = node.parentNode;
  }
  return i < 0;
}

class StubClassList {
  constructor(el) {
    this.el = el;
  }

  _all() {
    return (this.el.getAttribute("class") || "").split(/\s+/).filter(Boolean);
  }

  contains(name) {
    return this._all().includes(name);
  }

  add(...names) {
    const all = this._all();
    for (const n of names) if (!all.includes(n)) all.push(n);
    this.el.setAttribute("class", all.join(" "));
  }

  remove(...names) {
    this.el.setAttribute("class", this._all().filter((n) => !names.includes(n)).join(" "));
  }

  toggle(name, force) {
    const on = force === undefined ? !this.contains(name) : Boolean(force);
    if (on) this.add(name);
    else this.remove(name);
    return on;
  }
}

class StubElement extends StubNode {
  constructor(doc, tag, ns = null) {
    super(doc);
    this.nodeType = 1;
    this.namespaceURI = ns;
    this.localName = ns === SVG_NS ? tag : tag.toLowerCase();
    this.tagName = ns === SVG_NS ? tag : tag.toUpperCase();
    /** @type {StubNode[]} */
    this.childNodes = [];
    this._attrs = new Map();
    this._listeners = new Map();
    this.classList = new StubClassList(this);
    this.style = { setProperty: (k, v) => (this.style[k] = v) };
    this.value = "";
    this.checked = false;
    this.selected = false;
  }

  get children() {
    return this.childNodes.filter((n) => n instanceof StubElement);
  }

  get firstChild() {
    return this.childNodes[0] || null;
  }

  // ---- attributes ----
  setAttribute(name, value) {
    this._attrs.set(String(name).toLowerCase(), String(value));
  }

  getAttribute(name) {
    const v = this._attrs.get(String(name).toLowerCase());
    return v === undefined ? null : v;
  }

  hasAttribute(name) {
    return this._attrs.has(String(name).toLowerCase());
  }

  removeAttribute(name) {
    this._attrs.delete(String(name).toLowerCase());
  }

  toggleAttribute(name, force) {
    const on = force === undefined ? !this.hasAttribute(name) : Boolean(force);
    if (on) this.setAttribute(name, "");
    else this.removeAttribute(name);
    return on;
  }

  get className() {
    return this.getAttribute("class") || "";
  }

  set className(v) {
    this.setAttribute("class", v);
  }

  get hidden() {
    return this.hasAttribute("hidden");
  }

  set hidden(v) {
    this.toggleAttribute("hidden", Boolean(v));
  }

  get disabled() {
    return this.hasAttribute("disabled");
  }

  set disabled(v) {
    this.toggleAttribute("disabled", Boolean(v));
  }

  // ---- markup from strings is forbidden ----
  get innerHTML() {
    throw new Error("innerHTML read: afterfit views must not use markup strings");
  }

  set innerHTML(_v) {
    throw new Error("innerHTML write: afterfit views must not use markup strings");
  }

  get outerHTML() {
    throw new Error("outerHTML: afterfit views must not use markup strings");
  }

  insertAdjacentHTML() {
    throw new Error("insertAdjacentHTML: afterfit views must not use markup strings");
  }

  // ---- tree ----
  _adopt(node) {
    // the real DOM would insert the text "null"/"undefined": treat it as the bug it is
    if (node === null || node === undefined) throw new Error("append: null or undefined child");
    if (typeof node === "string") node = new StubText(this.ownerDocument, node);
    if (node.parentNode) node.parentNode.removeChild(node);
    node.parentNode = this;
    return node;
  }

  appendChild(node) {
    this.childNodes.push(this._adopt(node));
    return node;
  }

  append(...nodes) {
    for (const n of nodes) this.childNodes.push(this._adopt(n));
  }

  prepend(...nodes) {
    this.childNodes.unshift(...nodes.map((n) => this._adopt(n)));
  }

  insertBefore(node, ref) {
    const adopted = this._adopt(node);
    const i = ref ? this.childNodes.indexOf(ref) : -1;
    if (i < 0) this.childNodes.push(adopted);
    else this.childNodes.splice(i, 0, adopted);
    return node;
  }

  removeChild(node) {
    const i = this.childNodes.indexOf(node);
    if (i < 0) throw new Error("removeChild: not a child");
    this.childNodes.splice(i, 1);
    node.parentNode = null;
    this._dropFocus(node);
    return node;
  }

  replaceChildren(...nodes) {
    for (const old of [...this.childNodes]) this.removeChild(old);
    this.append(...nodes);
  }

  _dropFocus(node) {
    const doc = this.ownerDocument;
    if (doc.activeElement && (doc.activeElement === node || (node.contains && node.contains(doc.activeElement)))) {
      doc.activeElement = doc.body;
    }
  }

  contains(node) {
    for (let n = node; n; n = n.parentNode) if (n === this) return true;
    return false;
  }

  get textContent() {
    return this.childNodes.map((n) => n.textContent).join("");
  }

  set textContent(v) {
    this.replaceChildren();
    const text = String(v ?? "");
    if (text) this.append(new StubText(this.ownerDocument, text));
  }

  // ---- selectors ----
  matches(selector) {
    return parseSelector(selector).some((chain) => matchesChain(this, chain));
  }

  closest(selector) {
    const groups = parseSelector(selector);
    for (let n = this; n && n instanceof StubElement; n = n.parentNode) {
      if (groups.some((chain) => matchesChain(n, chain))) return n;
    }
    return null;
  }

  *_descendants() {
    for (const child of this.childNodes) {
      if (child instanceof StubElement) {
        yield child;
        yield* child._descendants();
      }
    }
  }

  querySelectorAll(selector) {
    const groups = parseSelector(selector);
    return [...this._descendants()].filter((n) => groups.some((chain) => matchesChain(n, chain)));
  }

  querySelector(selector) {
    return this.querySelectorAll(selector)[0] || null;
  }

  // ---- events ----
  addEventListener(type, fn) {
    if (!this._listeners.has(type)) this._listeners.set(type, []);
    const list = this._listeners.get(type);
    if (!list.includes(fn)) list.push(fn);
  }

  removeEventListener(type, fn) {
    const list = this._listeners.get(type) || [];
    const i = list.indexOf(fn);
    if (i >= 0) list.splice(i, 1);
  }

  /** Number of listeners on this element and every element below it. */
  listenerCount() {
    let count = 0;
    for (const n of [this, ...this._descendants()]) for (const list of n._listeners.values()) count += list.length;
    return count;
  }

  dispatchEvent(event) {
    if (!event.target) event.target = this;
    for (let n = this; n && !event._stopped; n = n.parentNode) {
      if (!(n instanceof StubElement)) break;
      event.currentTarget = n;
      for (const fn of [...(n._listeners.get(event.type) || [])]) fn.call(n, event);
      if (event.bubbles === false) break;
    }
    return !event.defaultPrevented;
  }

  click() {
    if (this.disabled) return; // browsers send no click to a disabled control
    if (this.localName === "input" && this.getAttribute("type") === "checkbox") {
      this.checked = !this.checked;
      this.dispatchEvent(makeEvent("click"));
      this.dispatchEvent(makeEvent("change"));
      return;
    }
    this.dispatchEvent(makeEvent("click"));
  }

  focus() {
    this.ownerDocument.activeElement = this;
  }

  blur() {
    if (this.ownerDocument.activeElement === this) this.ownerDocument.activeElement = this.ownerDocument.body;
  }

  select() {
    this.ownerDocument.selection = this;
  }

  setSelectionRange(start, end) {
    this.ownerDocument.selection = this;
    this.selectionRange = [start, end];
  }
}

class StubDocument {
  constructor({ navigator = {}, execCommand = () => false } = {}) {
    this.documentElement = new StubElement(this, "html");
    this.body = new StubElement(this, "body");
    this.documentElement.append(this.body);
    this.activeElement = this.body;
    this.selection = null;
    this.defaultView = { navigator };
    this.commands = [];
    this._execCommand = execCommand;
  }

  createElement(tag) {
    return new StubElement(this, tag);
  }

  createElementNS(ns, tag) {
    return new StubElement(this, tag, ns);
  }

  createTextNode(text) {
    return new StubText(this, text);
  }

  execCommand(name) {
    this.commands.push(name);
    return this._execCommand(name);
  }

  querySelector(selector) {
    return this.documentElement.querySelector(selector);
  }

  querySelectorAll(selector) {
    return this.documentElement.querySelectorAll(selector);
  }
}

/**
 * An event object as the views see it.
 * @param {string} type
 * @param {Record<string, any>} [props]
 */
export function makeEvent(type, props = {}) {
  return {
    type,
    bubbles: true,
    target: null,
    currentTarget: null,
    defaultPrevented: false,
    _stopped: false,
    preventDefault() {
      this.defaultPrevented = true;
    },
    stopPropagation() {
      this._stopped = true;
    },
    ...props,
  };
}

/** A DataTransfer that, like the browser's, only carries strings. */
export function makeDataTransfer() {
  const data = new Map();
  return {
    dropEffect: "none",
    effectAllowed: "all",
    setData(type, value) {
      data.set(type, String(value));
    },
    getData(type) {
      return data.has(type) ? data.get(type) : "";
    },
    get types() {
      return [...data.keys()];
    },
  };
}

/**
 * Simulate a drag from `source` onto `target`: dragstart, dragover, drop, dragend.
 * @returns {{over: object, drop: object}} the dragover and drop events (check defaultPrevented)
 */
export function dragAndDrop(source, target) {
  const dataTransfer = makeDataTransfer();
  source.dispatchEvent(makeEvent("dragstart", { dataTransfer }));
  const over = makeEvent("dragover", { dataTransfer });
  target.dispatchEvent(over);
  const drop = makeEvent("drop", { dataTransfer });
  target.dispatchEvent(drop);
  source.dispatchEvent(makeEvent("dragend", { dataTransfer }));
  return { over, drop, dataTransfer };
}

/** Press a key on an element (keydown only, as the views listen to keydown). */
export function press(el, key) {
  const event = makeEvent("keydown", { key });
  el.dispatchEvent(event);
  return event;
}

/**
 * A new document and a container element attached to its body.
 * @param {object} [options] navigator and execCommand for the document
 */
export function makePage(options) {
  const doc = new StubDocument(options);
  const el = doc.createElement("div");
  doc.body.append(el);
  return { doc, el };
}

/**
 * A fake anywidget model: get/set/on/off/save_changes/send, plus helpers for tests.
 * @param {Record<string, any>} state
 */
export function fakeModel(state) {
  const values = { ...state };
  const handlers = new Map();
  const model = {
    sent: /** @type {any[]} */ ([]),
    saved: 0,
    widget_manager: {},
    get(name) {
      return values[name];
    },
    set(name, value) {
      values[name] = value;
    },
    on(name, fn) {
      if (!handlers.has(name)) handlers.set(name, []);
      handlers.get(name).push(fn);
    },
    off(name, fn) {
      if (name == null) {
        handlers.clear();
        return;
      }
      const list = handlers.get(name) || [];
      if (fn == null) list.length = 0;
      else if (list.indexOf(fn) >= 0) list.splice(list.indexOf(fn), 1);
    },
    save_changes() {
      model.saved += 1;
    },
    send(content, _callbacks, buffers) {
      model.sent.push(buffers ? { ...content, _buffers: buffers } : content);
    },
    /** Python changed a trait: set it and fire change:<name>. */
    update(name, value) {
      values[name] = value;
      for (const fn of [...(handlers.get(`change:${name}`) || [])]) fn();
    },
    /** Python sent a custom message. */
    receive(content, buffers = []) {
      for (const fn of [...(handlers.get("msg:custom") || [])]) fn(content, buffers);
    },
    handlerCount() {
      let n = 0;
      for (const list of handlers.values()) n += list.length;
      return n;
    },
  };
  return model;
}

/** Elements (not text) anywhere below `root` whose tag is `tag`. */
export function elementsNamed(root, tag) {
  return [root, ...root._descendants()].filter((n) => n.localName === tag.toLowerCase());
}

/** A name that would run script if a view ever put data into markup. */
export const HOSTILE = "<img src=x onerror=alert(1)>";
