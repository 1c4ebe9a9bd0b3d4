"use strict";
// One channel: curve with its k·u band and recent samples, residuals, snapshots (overlay,
// roll back), bench calibration from pasted CSV, events.
const RECENT = 400;        // reference samples drawn on the plots
const GRID = 201;          // points of the curve over the operating range (or the whole input range)
const SOURCES = { declared: "declared", samples: "the span of the samples",
                  calibration: "no sample yet: the span of the last calibration's points",
                  input_range: "nothing known yet: the whole input range" };
const COLOURS = { curve: "#2c4d38", band: "rgba(63,107,79,0.18)", accepted: "#3b7ea1", rejected: "#a33a22",
                  overlay: "#6d3f74" };

const page = { id: decodeURIComponent(location.pathname.replace(/^\/ui\/channels\//, "").replace(/\/$/, "")),
               ch: null, curve: null, samples: [], snapshots: [], events: [], overlay: null, rollbackTarget: null };
const path = (rest = "") => `/v1/channels/${encodeURIComponent(page.id)}${rest}`;
const outUnit = () => page.ch.output.unit || "";
const firstX = (x) => (Array.isArray(x) ? x[0] : x);

function cursorAfter(seq) {  // the API's cursor: base64url of "v1:<seq>"
  return btoa(`v1:${seq}`).replace(/\+/g, "-").replace(/\//g, "_").replace(/=+$/, "");
}

async function loadRecentSamples(ch) {
  const total = (ch.n_samples || 0) + (ch.n_rejected || 0);
  const after = Math.max(0, total - RECENT);
  let items = [];
  let cursor = after > 0 ? cursorAfter(after) : null;
  for (let i = 0; i < 5; i++) {
    const q = "?limit=1000" + (cursor ? `&cursor=${cursor}` : "");
    const pageData = await CK.api("GET", path("/samples" + q));
    items = items.concat(pageData.items);
    cursor = pageData.next_cursor;
    if (!cursor) break;
  }
  return items.slice(-RECENT);
}

function fact(dl, term, ...value) {
  dl.append(CK.el("dt", { text: term }), CK.el("dd", {}, ...value));
}

function renderFacts() {
  const { ch } = page;
  const { num } = CK;
  const d = ch.drift || {};
  const dl = document.getElementById("channel-facts");
  dl.replaceChildren();
  document.getElementById("channel-id").textContent = ch.id;
  document.title = `curvekeeper · ${ch.id}`;
  document.getElementById("channel-description").textContent = ch.description || "";
  ch.inputs.forEach((inp, i) => fact(dl, ch.inputs.length > 1 ? `input ${i + 1}` : "input",
    `${inp.name} in ${inp.unit || "(no unit)"}, range ${num(inp.min, inp.unit)} to ${num(inp.max, inp.unit)}`));
  const o = ch.output;
  fact(dl, "output", `${o.name} in ${o.unit || "(no unit)"}` +
    (o.transform && o.transform !== "none" ? `, fitted as ${o.transform}(y + ${num(o.offset || 0, o.unit, 8)})` : ""));
  fact(dl, "basis", JSON.stringify(ch.basis));
  fact(dl, "learner", JSON.stringify(ch.learner));
  fact(dl, "drift", CK.badge(d.state), ` ${d.detector} statistic ${num(d.statistic, "", 3)} of ${num(d.alarm, "", 3)} ` +
    `(warning at ${num(d.warning, "", 3)}, alarm at ${num(d.alarm, "", 3)}; standardised residuals, no unit)`);
  fact(dl, "tolerance", ...(d.tolerance_state
    ? [CK.badge(d.tolerance_state), ` curve moved ${num(d.max_curve_change, outUnit(), 3)} from the last calibration ` +
       `(tolerance ${num(d.tolerance, outUnit(), 3)})`]
    : ["no tolerance check set"]));
  fact(dl, "forecast", CK.forecastText(ch.forecast, outUnit(), true));
  fact(dl, "samples", `${ch.n_samples} stored, ${ch.n_rejected} held back as outliers`);
  fact(dl, "rmse", num(ch.rmse, outUnit(), 3));
  fact(dl, "residual s.d.", residualSd(ch.residual_sd_output, ch.residual_sd));
  (ch.operating_range || []).forEach((r) => fact(dl, `operating range${ch.inputs.length > 1 ? ` of ${r.name}` : ""}`,
    `${num(r.min, unitOf(r.name))} to ${num(r.max, unitOf(r.name))} (${SOURCES[r.source] || r.source}); ` +
    "curve changes and the tolerance check are taken over it"));
  fact(dl, "coverage factor", ch.coverage_factor === null || ch.coverage_factor === undefined
    ? `k from Student's t at ${num(100 * ch.coverage, "%", 4)} coverage`
    : `k = ${num(ch.coverage_factor, "", 3)}`);
  fact(dl, "calibration due", ...(ch.due_on
    ? [CK.badge(ch.due_state), ` on ${ch.due_on} (every ${ch.recalibration_interval_days} days; ` +
       `last ${CK.when(ch.last_calibrated_at)} UTC; decision rule ${ch.decision_rule})`]
    : [`never calibrated (interval ${ch.recalibration_interval_days} days; decision rule ${ch.decision_rule})`]));
  fact(dl, "service", CK.badge(ch.service_state),
    ch.service_state === "out_of_service" ? " samples are stored, not learned; predictions say so" : "");
  fact(dl, "reporting", ...(ch.expected_interval
    ? [CK.badge(ch.stale ? "stale" : "ok"), ` a sample expected every ${num(ch.expected_interval, "s", 4)}` +
       (ch.stale ? `; stale since ${CK.when(ch.stale_since)} UTC (3 intervals without one)` : "")]
    : ["not watched (no expected_interval set)"]));
  fact(dl, "version", String(ch.version));
  fact(dl, "last sample (UTC)", CK.when(ch.last_sample_at));
}

const unitOf = (name) => (page.ch.inputs.find((i) => i.name === name) || {}).unit || "";
const fitted = () => page.ch.output.transform && page.ch.output.transform !== "none";

// the residual s.d. in output units (the service's figure), the fitted-space one beside it
function residualSd(output, inFittedSpace) {
  const { num } = CK;
  if (output === null || output === undefined) return "–";
  return num(output, outUnit(), 3) + (fitted()
    ? ` (${num(inFittedSpace, "", 3)} in the fitted ${page.ch.output.transform} space)` : "");
}

const curveView = () => ({ whole: document.getElementById("curve-whole").checked,
                           log: document.getElementById("curve-logx").checked });
const curvePath = () => path(`/curve?points=${GRID}&over=${curveView().whole ? "input" : "operating"}`);

function curveTraces() {
  const pts = page.curve.points.filter((p) => p.y !== null);
  const xs = pts.map((p) => firstX(p.x));
  const acc = page.samples.filter((s) => s.accepted);
  const rej = page.samples.filter((s) => !s.accepted);
  const traces = [
    { x: xs, y: pts.map((p) => p.upper), mode: "lines", line: { width: 0 }, hoverinfo: "skip",
      showlegend: false, name: "upper" },
    { x: xs, y: pts.map((p) => p.lower), mode: "lines", line: { width: 0 }, fill: "tonexty",
      fillcolor: COLOURS.band, name: "± U band (U = k·u)", hoverinfo: "skip" },
    { x: xs, y: pts.map((p) => p.y), mode: "lines", line: { color: COLOURS.curve, width: 2.5 },
      name: `current curve (version ${page.curve.version})`, uid: "curve" },
    { x: acc.map((s) => firstX(s.x)), y: acc.map((s) => s.y), mode: "markers", name: "reference samples, learned",
      marker: { color: COLOURS.accepted, size: 5, opacity: 0.75, symbol: "circle" } },
    { x: rej.map((s) => firstX(s.x)), y: rej.map((s) => s.y), mode: "markers", name: "held back (outliers)",
      marker: { color: COLOURS.rejected, size: 9, symbol: "x-thin-open", line: { width: 2, color: COLOURS.rejected } } },
  ];
  if (page.overlay) traces.push(page.overlay.trace);
  return traces;
}

// titles are plain text (names and units are the user's): escaped here for plotly
function plotLayout(xTitle, yTitle) {
  return { margin: { l: 70, r: 20, t: 10, b: 55 }, paper_bgcolor: "#ffffff", plot_bgcolor: "#fbfaf6",
           xaxis: { title: { text: CK.plotText(xTitle) }, gridcolor: "#e6e2d6", zeroline: false },
           yaxis: { title: { text: CK.plotText(yTitle) }, gridcolor: "#e6e2d6", zeroline: false },
           legend: { orientation: "h", y: -0.2 }, hovermode: "closest" };
}

const PLOT_CONFIG = { displaylogo: false, responsive: true, modeBarButtonsToRemove: ["select2d", "lasso2d"] };

function renderCurve() {
  const inp = page.ch.inputs[0];
  const o = page.ch.output;
  const view = curveView();
  const op = page.curve.operating_range[0];
  const [lo, hi] = view.whole ? [inp.min, inp.max] : [op.min, op.max];
  const logBox = document.getElementById("curve-logx");
  logBox.disabled = !(lo > 0);  // a log axis needs inputs above zero
  const log = view.log && lo > 0;
  const several = page.ch.inputs.length > 1 ? " (drawn against the first input; the others at the middle of their range)" : "";
  const over = view.whole ? `the whole input range ${CK.num(inp.min, inp.unit)} to ${CK.num(inp.max, inp.unit)}`
    : `the operating range ${CK.num(op.min, inp.unit)} to ${CK.num(op.max, inp.unit)} (${SOURCES[op.source] || op.source})`;
  document.getElementById("curve-caption").textContent =
    `${o.name} (${o.unit}) against ${inp.name} (${inp.unit}) over ${over}${several}${log ? ", log x axis" : ""}; ` +
    `the band is ± U, the expanded uncertainty k·u at each point. Last ${page.samples.length} reference samples shown.`;
  const layout = plotLayout(`${inp.name} (${inp.unit})`, `${o.name} (${o.unit})`);
  const pad = lo < hi ? 0.02 * (log ? Math.log10(hi / lo) : hi - lo) : 0;
  layout.xaxis.type = log ? "log" : "linear";
  if (lo < hi) {
    layout.xaxis.range = log ? [Math.log10(lo) - pad, Math.log10(hi) + pad] : [lo - pad, hi + pad];
  }
  const plot = document.getElementById("curve-plot");
  plot.dataset.over = view.whole ? "input" : "operating";
  plot.dataset.xaxis = layout.xaxis.type;
  return Plotly.react("curve-plot", curveTraces(), layout, PLOT_CONFIG);
}

async function changeCurveView() {
  const msg = document.getElementById("page-message");
  try {
    page.curve = await CK.api("GET", curvePath());
    if (page.overlay) await overlaySnapshot(page.overlay.snapshot, true);
    await renderCurve();
  } catch (e) {
    CK.say(msg, `Could not draw the curve: ${e.message}`, "error");
  }
}

function renderResiduals() {
  const acc = page.samples.filter((s) => s.accepted && s.residual !== null);
  const rej = page.samples.filter((s) => !s.accepted && s.residual !== null);
  const d = page.ch.drift || {};
  document.getElementById("residual-caption").textContent =
    `Prior residual (reference − curve before the step) of each recent sample, in ${outUnit()}. ` +
    `Drift detector ${d.detector}: statistic ${CK.num(d.statistic, "", 3)} now ` +
    `(warning at ${CK.num(d.warning, "", 3)}, alarm at ${CK.num(d.alarm, "", 3)}).`;
  const withStat = page.samples.filter((s) => s.drift_statistic !== null && s.drift_statistic !== undefined);
  const times = page.samples.map((s) => s.t);
  const first = times[0], last = times[times.length - 1];
  const layout = plotLayout("sample time (UTC)", `residual (${outUnit()})`);
  layout.yaxis2 = { title: { text: "drift statistic (no unit)" }, overlaying: "y", side: "right", rangemode: "tozero",
                    showgrid: false };
  return Plotly.react("residual-plot", [
    { x: acc.map((s) => s.t), y: acc.map((s) => s.residual), mode: "markers", name: "learned",
      marker: { color: COLOURS.accepted, size: 4 } },
    { x: rej.map((s) => s.t), y: rej.map((s) => s.residual), mode: "markers", name: "held back",
      marker: { color: COLOURS.rejected, size: 8, symbol: "x-thin-open", line: { width: 2, color: COLOURS.rejected } } },
    { x: withStat.map((s) => s.t), y: withStat.map((s) => s.drift_statistic), mode: "lines", name: "drift statistic",
      yaxis: "y2", line: { color: "#6b4e8a", width: 1.5 } },
    { x: [first, last], y: [d.warning, d.warning], mode: "lines", name: "warning", yaxis: "y2",
      line: { color: "#b7791f", width: 1, dash: "dot" } },
    { x: [first, last], y: [d.alarm, d.alarm], mode: "lines", name: "alarm", yaxis: "y2",
      line: { color: "#9b2c2c", width: 1, dash: "dash" } },
  ], layout, PLOT_CONFIG);
}

function renderSnapshots() {
  const { el } = CK;
  const rows = page.snapshots.slice().reverse().map((s) => el("tr", { "data-snapshot": s.id },
    el("td", { class: "num", text: String(s.id) }),
    el("td", { text: s.reason }),
    el("td", { text: s.label || "" }),
    el("td", { class: "num", text: String(s.version) }),
    el("td", { class: "num", text: String(s.n_samples) }),
    el("td", { text: CK.when(s.created_at) }),
    el("td", {},
      el("button", { type: "button", class: "small quiet overlay", "data-snapshot": s.id, text: "Overlay",
                     onclick: () => overlaySnapshot(s) }),
      el("button", { type: "button", class: "small danger rollback", "data-snapshot": s.id, text: "Roll back…",
                     onclick: () => askRollback(s) }))));
  document.querySelector("#snapshot-table tbody").replaceChildren(...rows);
}

function eventSummary(ev) {
  const d = ev.details || {};
  const parts = [];
  for (const [k, v] of Object.entries(d)) {
    if (k === "points" && Array.isArray(v)) { parts.push(`${v.length} points`); continue; }
    if (k === "config") { parts.push("configuration"); continue; }
    if (k === "measured_at") continue;  // shown as the event's time
    if (v === null || v === undefined) continue;
    const unit = ["max_curve_change", "rmse_output", "tolerance", "residual_sd_output"].includes(k) ? outUnit()
      : k === "residual_sd" ? (fitted() ? "(fitted space)" : outUnit()) : "";
    let text = typeof v === "number" ? CK.num(v, unit, 4)
      : typeof v === "object" ? JSON.stringify(v) : String(v);
    if (text.length > 80) text = text.slice(0, 77) + "…";
    parts.push(`${k.replace(/_/g, " ")} ${text}`);
  }
  return parts.join("; ");
}

function renderEvents(events) {
  const { el } = CK;
  // when it happened: the sample's measurement time where the event came from a sample, with
  // the time the service received it beside it
  const when = (ev) => (ev.details && ev.details.measured_at)
    ? [CK.when(ev.details.measured_at), " ", el("small", { class: "received", text: `received ${CK.when(ev.at)}` })]
    : [CK.when(ev.at)];
  const rows = events.slice().reverse().slice(0, 300).map((ev) => el("tr", { "data-kind": ev.kind },
    el("td", {}, ...when(ev)),
    el("td", { text: ev.kind.replace(/_/g, " ") }),
    el("td", { class: "num", text: ev.version === null ? "" : String(ev.version) }),
    el("td", { text: eventSummary(ev) })));
  document.querySelector("#event-table tbody").replaceChildren(...rows);
}

async function loadAll() {
  const msg = document.getElementById("page-message");
  try {
    page.ch = await CK.api("GET", path());
    const [curve, samples, snapshots, events] = await Promise.all([
      CK.api("GET", curvePath()), loadRecentSamples(page.ch),
      CK.all(path("/snapshots"), 1000, 20), CK.all(path("/events"), 1000, 10)]);
    Object.assign(page, { curve, samples, snapshots, events });
  } catch (e) {
    CK.say(msg, e.status === 404 ? `There is no channel ${page.id}.` : `Could not load the channel: ${e.message}`, "error");
    return;
  }
  if (page.overlay) await overlaySnapshot(page.overlay.snapshot, true);
  renderFacts();
  ARCHIVE.render(page.ch, loadAll);
  await renderCurve();
  await renderResiduals();
  renderSnapshots();
  renderEvents(page.events);
  await CKRecords.load(path(), outUnit()).catch((e) => CK.say(msg, `Could not load the calibration records: ${e.message}`, "error"));
  document.body.dataset.loaded = String(page.ch.version);
}

// The largest difference from the current curve is the service's figure (one grid, one
// computation for the page, the command line and the API); the page only draws.
async function difference(snapshot) {
  return (await CK.api("GET", path(`/snapshots/${snapshot.id}`))).curve_difference;
}

function differenceParts(d) {  // the service's figure and where, for the text; null when not comparable
  if (d.max === null) return null;
  const at = (Array.isArray(d.at) ? d.at : [d.at]).map((v, i) => CK.num(v, page.ch.inputs[i].unit || "")).join(", ");
  return { figure: CK.num(d.max, outUnit(), 3), at };
}

async function overlaySnapshot(snapshot, quiet = false) {
  const out = document.getElementById("overlay-result");
  try {
    const pts = page.curve.points;
    const [res, diff] = await Promise.all([
      CK.api("POST", path("/predict"), { x: pts.map((p) => p.x), snapshot: snapshot.id }), difference(snapshot)]);
    page.overlay = { snapshot, diff, trace: {
      x: pts.map((p) => firstX(p.x)), y: res.y, mode: "lines", uid: "overlay",
      name: CK.plotText(`snapshot ${snapshot.id} (${snapshot.reason}, version ${snapshot.version})`),
      line: { color: COLOURS.overlay, width: 2, dash: "dash" } } };
    const parts = differenceParts(diff);
    out.textContent = `Snapshot ${snapshot.id} (${snapshot.reason}, version ${snapshot.version}) overlaid: ` +
      (parts ? `largest difference from the current curve ${parts.figure} at ${parts.at}.`
             : "the two curves have no finite values in common, so no difference can be given.");
    out.dataset.maxDifference = String(diff.max);
    out.dataset.snapshot = String(snapshot.id);
    if (!quiet) await renderCurve();
  } catch (e) {
    out.textContent = `Could not overlay snapshot ${snapshot.id}: ${e.message}`;
  }
}

async function askRollback(snapshot) {
  const { el } = CK;
  const text = document.getElementById("rollback-text");
  const dialog = document.getElementById("rollback-dialog");
  page.rollbackTarget = snapshot;
  let diff = "an amount that could not be computed";
  try {
    const parts = differenceParts(await difference(snapshot));
    if (parts) diff = `up to ${parts.figure} (at ${parts.at})`;
  } catch (_) { /* the dialog still says what will change */ }
  const ch = page.ch;
  text.replaceChildren(
    el("p", {}, `Channel `, el("strong", { text: ch.id }), ` goes back to snapshot ${snapshot.id}` +
       ` (${snapshot.reason}${snapshot.label ? `, “${snapshot.label}”` : ""}, version ${snapshot.version}, ` +
       `${snapshot.n_samples} samples, taken ${CK.when(snapshot.created_at)} UTC).`),
    el("ul", {},
      el("li", { text: `Its curve changes by ${diff} over the operating range.` }),
      el("li", { text: `The current state (version ${ch.version}) is first kept as a new snapshot, so this can be undone; ` +
                       `the channel's version becomes ${ch.version + 1}.` }),
      el("li", { text: "The reference curve (of the last calibration) stays, unless you tick the box below." }),
      el("li", { text: "Stored samples stay stored; they are not learned again." })));
  document.getElementById("rollback-reason").value = "";
  document.getElementById("rollback-set-reference").checked = false;
  dialog.showModal();
}

async function doRollback() {
  const dialog = document.getElementById("rollback-dialog");
  const snapshot = page.rollbackTarget;
  const msg = document.getElementById("page-message");
  const button = document.getElementById("rollback-confirm");
  button.disabled = true;
  try {
    const body = { snapshot: snapshot.id };
    const reason = document.getElementById("rollback-reason").value.trim();
    if (reason) body.reason = reason;
    if (document.getElementById("rollback-set-reference").checked) body.set_reference = true;
    const res = await CK.api("POST", path("/rollback"), body);
    dialog.close();
    page.overlay = null;
    document.getElementById("overlay-result").textContent = "";
    CK.say(msg, `Rolled back to snapshot ${res.restored_snapshot}: the channel is now at version ${res.version}; ` +
                `the state before is kept as snapshot ${res.snapshot_before}.`, "done");
    await loadAll();
  } catch (e) {
    dialog.close();
    CK.say(msg, `The rollback failed and nothing changed: ${e.message}`, "error");
  } finally {
    button.disabled = false;
  }
}

let pendingFit = null;

function showReport(report, rep) {
  const u = outUnit();
  const { num } = CK;
  report.replaceChildren();
  fact(report, "points fitted", String(rep.n));
  if (rep.csv) {
    fact(report, "read", `${rep.csv.rows} row${rep.csv.rows === 1 ? "" : "s"}: input${rep.csv.x_columns.length > 1 ? "s" : ""} ` +
      `from ${rep.csv.x_columns.join(", ")}, reference from ${rep.csv.y_column}`);
  }
  fact(report, "rms residual", num(rep.rmse_output, u, 3));
  fact(report, "residual s.d.", residualSd(rep.residual_sd_output, rep.residual_sd));
  fact(report, "R²", `${rep.r_squared === null ? "–" : rep.r_squared.toFixed(6)} (dimensionless)`);
  fact(report, "largest curve change", rep.max_curve_change === null ? "– (no finite earlier curve to compare)"
    : `${num(rep.max_curve_change, u, 3)} over the operating range`);
  if (rep.raw_term_names) {  // the terms as the service names them (the command line shows the same)
    const sd = rep.raw_coefficient_sd || [];
    const terms = CK.el("ul", { class: "terms" }, ...rep.raw_coefficients.map((c, i) => CK.el("li", {
      "data-term": rep.raw_term_names[i],
      text: `${rep.raw_term_names[i]}: ${num(c, "", 6)}${sd[i] != null ? ` ± ${num(sd[i], "", 2)}` : ""}` })));
    fact(report, "coefficients", terms, fitted() ? `per raw term, of the fitted ${page.ch.output.transform} space`
                                                 : "per raw term");
  }
  if (rep.applied) {
    fact(report, "snapshots", `before ${rep.snapshot_before}, after ${rep.snapshot_after}`);
    fact(report, "version", String(rep.version));
  }
}

async function submitCalibration(ev) {
  ev.preventDefault();
  const msg = document.getElementById("calibrate-message");
  const report = document.getElementById("calibrate-report");
  const apply = document.getElementById("calibrate-apply");
  const history = document.getElementById("calibrate-history").checked;
  apply.hidden = true;
  pendingFit = null;
  const text = document.getElementById("calibrate-csv").value;
  const hasText = text.split(/\r?\n/).some((l) => l.trim() && !l.trim().startsWith("#"));
  if (!hasText && !history) { CK.say(msg, "Paste at least one point, or fit the stored samples.", "error"); return; }
  const label = document.getElementById("calibrate-label").value.trim();
  const xcols = document.getElementById("calibrate-xcols").value.split(",").map((c) => c.trim()).filter((c) => c);
  const ycol = document.getElementById("calibrate-ycol").value.trim();
  const button = document.getElementById("calibrate-button");
  button.disabled = true;
  CK.say(msg, "Fitting …");
  try {
    // the service reads the CSV text (the command line sends the same), so both take the same files
    const body = { include_history: history };
    if (hasText) body.csv = text;
    if (hasText && xcols.length) body.x_columns = xcols;
    if (hasText && ycol) body.y_column = ycol;
    if (label) body.label = label;
    const reason = document.getElementById("calibrate-reason").value.trim();
    if (reason) body.reason = reason;
    const reference = document.getElementById("calibrate-reference").value;
    if (reference) {
      body.reference = reference;
      body.allow_overdue_reference = document.getElementById("calibrate-allow-overdue").checked;
    }
    const note = document.getElementById("calibrate-conditions").value.trim();
    if (note) body.conditions = { values: {}, note };
    const rep = await CK.api("POST", path("/calibrate"), { ...body, dry_run: true });
    showReport(report, rep);
    pendingFit = body;
    apply.hidden = false;
    CK.say(msg, "Preview: nothing has changed yet. Apply the fit to replace the curve.", "preview");
  } catch (e) {
    CK.say(msg, `The points cannot be fitted: ${e.message}`, "error");
  } finally {
    button.disabled = false;
  }
}

async function applyCalibration() {
  const msg = document.getElementById("calibrate-message");
  const report = document.getElementById("calibrate-report");
  const apply = document.getElementById("calibrate-apply");
  if (!pendingFit) return;
  apply.disabled = true;
  try {
    const rep = await CK.api("POST", path("/calibrate"), pendingFit);
    showReport(report, rep);
    pendingFit = null;
    apply.hidden = true;
    CK.say(msg, `The curve was replaced by the fit (version ${rep.version}); the previous curve is snapshot ${rep.snapshot_before}.`, "done");
    await loadAll();
  } catch (e) {
    CK.say(msg, `The fit was not applied: ${e.message}`, "error");
  } finally {
    apply.disabled = false;
  }
}

async function loadReferences() {
  // the reference instruments a calibration may name: not retired, overdue ones marked
  const select = document.getElementById("calibrate-reference");
  try {
    const refs = await CK.all("/v1/references?retired=false");
    select.replaceChildren(CK.el("option", { value: "", text: "none named" }), ...refs.map((r) =>
      CK.el("option", { value: r.id, text: `${r.id} (certificate ${r.certificate}, due ${r.due_on}` +
                                             `${r.due_state === "overdue" ? ", OVERDUE" : ""})` })));
  } catch (_) { /* a key that may not list them calibrates without naming one */ }
}

document.addEventListener("DOMContentLoaded", () => {
  if (!CK.key()) { location.assign("/ui/"); return; }
  document.getElementById("rollback-cancel").addEventListener("click", () => document.getElementById("rollback-dialog").close());
  document.getElementById("rollback-confirm").addEventListener("click", doRollback);
  document.getElementById("calibrate-form").addEventListener("submit", submitCalibration);
  document.getElementById("calibrate-apply").addEventListener("click", applyCalibration);
  document.getElementById("curve-whole").addEventListener("change", changeCurveView);
  document.getElementById("curve-logx").addEventListener("change", changeCurveView);
  document.getElementById("calibrate-file").addEventListener("change", async (ev) => {
    const file = ev.target.files && ev.target.files[0];
    if (file) document.getElementById("calibrate-csv").value = await file.text();
  });
  loadAll();
  loadReferences();
});
