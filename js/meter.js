// afterfit fit meter: training vs cross-validated RMSE now and over every step (anywidget ES module).
//
// Synced state (from Python): steps (one small record per step; a few dozen at most), position,
// error.  The view draws its own SVG; it sends nothing to Python.

/**
 * One row of Study.meter() as Python sends it.
 * @typedef {object} MeterRow
 * @property {number} step
 * @property {string} label
 * @property {string} [kind]
 * @property {number|null} rmse_train
 * @property {number|null} rmse_cv
 * @property {number|null} rmse_cv_se
 * @property {number|null} gap
 * @property {number|null} delta_cv
 * @property {boolean} worse     CV got worse with this step
 * @property {boolean} one_se    the step the one-standard-error rule picks
 * @property {number|string[]} terms_added
 * @property {number|string[]} terms_removed
 * @property {number|null} examined
 */

/**
 * The part of an anywidget model this module uses.
 * @typedef {object} Model
 * @property {(name: string) => any} get
 * @property {(event: string, fn: Function) => void} on
 * @property {(event: string, fn?: Function) => void} off
 */

const SVG = "http://www.w3.org/2000/svg";
const WIDTH = 320;

/**
 * A number with four significant digits, or "n/a".
 * @param {number|null|undefined} x
 * @returns {string}
 */
export function fmt(x) {
  if (typeof x !== "number" || !Number.isFinite(x)) return "n/a";
  return String(Number(x.toPrecision(4)));
}

/**
 * Range of every finite RMSE (and CV ± SE) in the rows, padded so dots do not sit on the edge.
 * @param {MeterRow[]} rows
 * @returns {[number, number] | null}
 */
export function rmseRange(rows) {
  const values = [];
  for (const r of rows) {
    const se = finite(r.rmse_cv_se) ? r.rmse_cv_se : 0;
    if (finite(r.rmse_train)) values.push(r.rmse_train);
    if (finite(r.rmse_cv)) values.push(r.rmse_cv - se, r.rmse_cv + se);
  }
  if (!values.length) return null;
  let lo = Math.min(...values);
  let hi = Math.max(...values);
  const pad = hi > lo ? (hi - lo) * 0.08 : Math.abs(hi) * 0.05 || 1;
  return [lo - pad, hi + pad];
}

/**
 * SVG path text through the points, starting a new piece after a missing value.
 * @param {Array<[number, number] | null>} points
 * @returns {string}
 */
export function pathThrough(points) {
  let d = "";
  let pen = false;
  for (const p of points) {
    if (!p) {
      pen = false;
      continue;
    }
    d += `${pen ? "L" : "M"}${p[0].toFixed(1)} ${p[1].toFixed(1)} `;
    pen = true;
  }
  return d.trim();
}

/**
 * How a count or a list of names of changed terms reads.
 * @param {number|string[]|undefined} v
 * @returns {string}
 */
export function changeText(v) {
  if (Array.isArray(v)) return v.length ? v.join(", ") : "none";
  if (typeof v === "number" && Number.isFinite(v)) return String(v);
  return "none";
}

/** @param {any} x @returns {x is number} */
function finite(x) {
  return typeof x === "number" && Number.isFinite(x);
}

/**
 * @param {Document} doc
 * @param {string} tag
 * @param {Record<string, any>} [attrs]
 * @param {...(Node|null|undefined)} children
 */
function h(doc, tag, attrs = {}, ...children) {
  const node = doc.createElement(tag);
  return fill(node, attrs, children);
}

/**
 * @param {Document} doc
 * @param {string} tag
 * @param {Record<string, any>} [attrs]
 * @param {...(Node|null|undefined)} children
 */
function s(doc, tag, attrs = {}, ...children) {
  return fill(doc.createElementNS(SVG, tag), attrs, children);
}

/** @param {Element} node @param {Record<string, any>} attrs @param {any[]} children */
function fill(node, attrs, children) {
  for (const [key, value] of Object.entries(attrs)) {
    if (value === null || value === undefined || value === false) continue;
    if (key === "text") node.textContent = String(value);
    else node.setAttribute(key, value === true ? "" : String(value));
  }
  for (const child of children) if (child) node.append(child);
  return node;
}

/**
 * Draw the meter into `el` and redraw when the model changes.
 * @param {{model: Model, el: HTMLElement}} ctx
 * @returns {() => void} cleanup
 */
function render({ model, el }) {
  const doc = el.ownerDocument;
  const root = h(doc, "div", { class: "afterfit afterfit-meter" });
  el.append(root);

  /** @returns {MeterRow[]} */
  const rows = () => {
    const value = model.get("steps");
    return Array.isArray(value) ? value.filter((/** @type {any} */ r) => r && typeof r === "object") : [];
  };

  /**
   * @param {MeterRow} now
   * @param {[number, number]} range
   */
  function dumbbell(now, range) {
    const [lo, hi] = range;
    const x = (/** @type {number} */ v) => 40 + ((v - lo) / (hi - lo || 1)) * (WIDTH - 80);
    const y = 22;
    const svg = s(doc, "svg", {
      class: "afterfit-dumbbell",
      viewBox: `0 0 ${WIDTH} 44`,
      role: "img",
      "aria-label": `Training RMSE ${fmt(now.rmse_train)}, cross-validated RMSE ${fmt(now.rmse_cv)} plus or minus ${fmt(now.rmse_cv_se)}`,
    });
    svg.append(s(doc, "line", { class: "afterfit-axis", x1: 40, x2: WIDTH - 40, y1: y + 12, y2: y + 12 }));
    svg.append(s(doc, "text", { class: "afterfit-tick", x: 40, y: y + 22, "text-anchor": "middle", text: fmt(lo) }));
    svg.append(s(doc, "text", { class: "afterfit-tick", x: WIDTH - 40, y: y + 22, "text-anchor": "middle", text: fmt(hi) }));
    if (finite(now.rmse_train) && finite(now.rmse_cv)) {
      svg.append(s(doc, "line", { class: "afterfit-gap", x1: x(now.rmse_train), x2: x(now.rmse_cv), y1: y, y2: y }));
    }
    if (finite(now.rmse_cv) && finite(now.rmse_cv_se)) {
      svg.append(
        s(doc, "line", { class: "afterfit-whisker", x1: x(now.rmse_cv - now.rmse_cv_se), x2: x(now.rmse_cv + now.rmse_cv_se), y1: y, y2: y }),
      );
    }
    // labels sit on the outer side of each mark, so they never overlap when the gap is small
    const cvRight = !(finite(now.rmse_train) && finite(now.rmse_cv)) || now.rmse_cv >= now.rmse_train;
    if (finite(now.rmse_train)) {
      const cx = x(now.rmse_train);
      svg.append(
        s(doc, "circle", { class: "afterfit-dot-train", cx, cy: y, r: 5 }, s(doc, "title", { text: `training RMSE ${fmt(now.rmse_train)}` })),
        s(doc, "text", { class: "afterfit-dot-label", x: cvRight ? cx - 8 : cx + 8, y: y + 3, "text-anchor": cvRight ? "end" : "start", text: "train" }),
      );
    }
    if (finite(now.rmse_cv)) {
      const cx = x(now.rmse_cv);
      svg.append(
        s(doc, "rect", { class: "afterfit-dot-cv", x: cx - 5, y: y - 5, width: 10, height: 10, transform: `rotate(45 ${cx} ${y})` }, s(doc, "title", { text: `cross-validated RMSE ${fmt(now.rmse_cv)}` })),
        s(doc, "text", { class: "afterfit-dot-label", x: cvRight ? cx + 9 : cx - 9, y: y + 3, "text-anchor": cvRight ? "start" : "end", text: "CV" }),
      );
    }
    return svg;
  }

  /**
   * @param {MeterRow[]} all
   * @param {number} current index into all
   * @param {[number, number]} range
   */
  function history(all, current, range) {
    const [lo, hi] = range;
    const height = 130;
    const top = 12;
    const bottom = height - 24;
    const left = 44;
    const right = WIDTH - 14;
    const n = all.length;
    const x = (/** @type {number} */ i) => (n === 1 ? (left + right) / 2 : left + (i / (n - 1)) * (right - left));
    const y = (/** @type {number} */ v) => bottom - ((v - lo) / (hi - lo || 1)) * (bottom - top);
    const worse = all.filter((r) => r.worse).map((r) => r.step);
    const pick = all.find((r) => r.one_se);
    const svg = s(doc, "svg", {
      class: "afterfit-history",
      viewBox: `0 0 ${WIDTH} ${height}`,
      role: "img",
      "aria-label":
        `RMSE over ${n} step${n === 1 ? "" : "s"}. ` +
        (worse.length ? `Cross-validated RMSE got worse at step ${worse.join(", ")}. ` : "Cross-validated RMSE never got worse. ") +
        (pick ? `The one-standard-error rule picks step ${pick.step}.` : ""),
    });
    svg.append(
      s(doc, "line", { class: "afterfit-axis", x1: left, x2: left, y1: top, y2: bottom }),
      s(doc, "line", { class: "afterfit-axis", x1: left, x2: right, y1: bottom, y2: bottom }),
      s(doc, "text", { class: "afterfit-tick", x: left - 4, y: y(hi) + 4, "text-anchor": "end", text: fmt(hi) }),
      s(doc, "text", { class: "afterfit-tick", x: left - 4, y: y(lo) + 4, "text-anchor": "end", text: fmt(lo) }),
    );
    // the current step: a vertical guide behind the lines
    svg.append(s(doc, "line", { class: "afterfit-now", x1: x(current), x2: x(current), y1: top, y2: bottom }));
    const labelEvery = Math.max(1, Math.ceil(n / 12));
    all.forEach((r, i) => {
      if (i % labelEvery === 0 || i === n - 1) {
        svg.append(s(doc, "text", { class: "afterfit-tick", x: x(i), y: bottom + 13, "text-anchor": "middle", text: String(r.step) }));
      }
    });
    /** @param {"rmse_train"|"rmse_cv"} key */
    const at = (key) =>
      all.map((r, i) => {
        const v = r[key];
        return finite(v) ? /** @type {[number, number]} */ ([x(i), y(v)]) : null;
      });
    svg.append(
      s(doc, "path", { class: "afterfit-line-train", d: pathThrough(at("rmse_train")), fill: "none" }),
      s(doc, "path", { class: "afterfit-line-cv", d: pathThrough(at("rmse_cv")), fill: "none" }),
    );
    all.forEach((r, i) => {
      if (finite(r.rmse_train)) {
        svg.append(s(doc, "circle", { class: "afterfit-dot-train", cx: x(i), cy: y(r.rmse_train), r: 2.5 }));
      }
      if (!finite(r.rmse_cv)) return;
      const cx = x(i);
      const cy = y(r.rmse_cv);
      const tip = `step ${r.step}: ${r.label || ""} \u2014 training ${fmt(r.rmse_train)}, CV ${fmt(r.rmse_cv)}`;
      svg.append(s(doc, "circle", { class: "afterfit-dot-cv", cx, cy, r: 3 }, s(doc, "title", { text: tip })));
      if (r.worse) {
        // a downward triangle above the point: CV got worse here
        svg.append(
          s(
            doc,
            "path",
            { class: "afterfit-mark-worse", d: `M${(cx - 4).toFixed(1)} ${(cy - 11).toFixed(1)} L${(cx + 4).toFixed(1)} ${(cy - 11).toFixed(1)} L${cx.toFixed(1)} ${(cy - 5).toFixed(1)} Z` },
            s(doc, "title", { text: `step ${r.step}: CV RMSE got worse by ${fmt(r.delta_cv)}` }),
          ),
        );
      }
      if (r.one_se) {
        svg.append(
          s(doc, "circle", { class: "afterfit-mark-onese", cx, cy, r: 7, fill: "none" }, s(doc, "title", { text: `step ${r.step}: the one-standard-error rule picks this step` })),
        );
      }
    });
    return svg;
  }

  function draw() {
    const all = rows();
    const error = String(model.get("error") || "");
    const parts = [];
    const head = h(doc, "div", { class: "afterfit-zone-head afterfit-meter-head" }, h(doc, "span", { class: "afterfit-zone-title", text: "Fit meter" }));
    parts.push(head);
    if (!all.length) {
      parts.push(h(doc, "p", { class: "afterfit-empty", text: "No fitted steps yet." }));
    } else {
      const position = model.get("position");
      let current = all.findIndex((r) => r.step === position);
      if (current < 0) current = all.length - 1;
      const now = all[current];
      head.append(h(doc, "span", { class: "afterfit-meter-step", text: `step ${now.step}${now.label ? ": " + now.label : ""}` }));
      parts.push(
        h(doc, "p", {
          class: "afterfit-meter-numbers",
          text: `training RMSE ${fmt(now.rmse_train)} \u00B7 CV RMSE ${fmt(now.rmse_cv)} \u00B1 ${fmt(now.rmse_cv_se)} \u00B7 gap ${fmt(now.gap)}`,
        }),
      );
      const range = rmseRange(all);
      if (range) {
        parts.push(dumbbell(now, range));
        parts.push(history(all, current, range));
      }
      parts.push(
        h(
          doc,
          "ul",
          { class: "afterfit-legend", "aria-label": "Legend" },
          h(doc, "li", { class: "afterfit-key-train", text: "\u25CF training RMSE (solid line)" }),
          h(doc, "li", { class: "afterfit-key-cv", text: "\u25C6 cross-validated RMSE (dashed line)" }),
          h(doc, "li", { class: "afterfit-key-worse", text: "\u25BC CV got worse at that step" }),
          h(doc, "li", { class: "afterfit-key-onese", text: "\u25CB step the one-standard-error rule picks" }),
        ),
      );
      const examined = finite(now.examined) ? now.examined : 0;
      parts.push(
        h(doc, "p", {
          class: "afterfit-examined",
          text:
            `${examined} candidate${examined === 1 ? "" : "s"} examined \u00B7 ` +
            `since the start: terms added ${changeText(now.terms_added)}, removed ${changeText(now.terms_removed)}`,
        }),
      );
      if (examined > 0) {
        parts.push(
          h(doc, "p", {
            class: "afterfit-caution",
            text: "The more candidates examined, the more a training-error gain can be luck: trust the CV line.",
          }),
        );
      }
    }
    parts.push(h(doc, "p", { class: `afterfit-status${error ? " afterfit-error" : ""}`, role: "status", text: error }));
    root.replaceChildren(...parts);
  }

  const events = ["change:steps", "change:position", "change:error"];
  for (const name of events) model.on(name, draw);
  draw();

  return () => {
    for (const name of events) model.off(name, draw);
    root.remove();
  };
}

export default { render };
