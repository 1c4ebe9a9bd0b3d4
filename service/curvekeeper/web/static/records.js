"use strict";
// A channel's calibration history: one row per record (when, by whom, the decision rule, the
// verdicts as found and as left), and one record in full on demand: the as-found and as-left
// tables with each point's verdict, the fit, the uncertainty budget, the conditions and the
// suggested interval. Records are read only: a correction is a new calibration that names one.
const CKRecords = (() => {
  const { el, num } = CK;
  const RULES = { simple: "simple acceptance (pass when |error| ≤ tolerance)",
                  guarded: "guard band w = U (pass when |error| ≤ tolerance − U, fail beyond tolerance + U, " +
                           "conditional between)" };
  const state = { base: "", unit: "", records: [] };

  function verdict(v) {
    return el("span", { class: `state state-${v}`, text: v === "not_applicable" ? "not judged" : v });
  }

  function xText(x) {
    return Array.isArray(x) ? x.map((v) => num(v, "", 6)).join(", ") : num(x, "", 6);
  }

  function pointTable(id, points) {
    const u = state.unit;
    return el("table", { class: "grid", id },
      el("thead", {}, el("tr", {}, ...["reading", "reference", "indicated", "error", "tolerance", "U", "verdict"]
        .map((h, i) => el("th", { class: i && i < 6 ? "num" : "", text: h })))),
      el("tbody", {}, ...points.map((p) => el("tr", {},
        el("td", { text: xText(p.x) }),
        el("td", { class: "num", text: num(p.reference_value, u, 6) }),
        el("td", { class: "num", text: p.indicated === null ? "no curve" : num(p.indicated, u, 6) }),
        el("td", { class: "num", text: num(p.error, u, 3) }),
        el("td", { class: "num", text: p.tolerance === null ? "none set" : num(p.tolerance, u, 3) }),
        el("td", { class: "num", text: num(p.U, u, 3) }),
        el("td", {}, verdict(p.verdict))))));
  }

  function budgetTable(b) {
    if (!b.rows.length) return el("p", { text: "No uncertainty budget: the fit left no residual degrees of freedom." });
    const u = state.unit;
    return el("table", { class: "grid", id: "record-budget" },
      el("thead", {}, el("tr", {}, ...["source", "type", "distribution", "u", "sensitivity", "contribution", "dof"]
        .map((h, i) => el("th", { class: i > 2 ? "num" : "", text: h })))),
      el("tbody", {}, ...b.rows.map((r) => el("tr", {},
        el("td", { text: r.source }), el("td", { text: r.type }), el("td", { text: r.distribution }),
        el("td", { class: "num", text: num(r.u, "", 3) }), el("td", { class: "num", text: num(r.sensitivity, "", 4) }),
        el("td", { class: "num", text: num(r.contribution, u, 3) }),
        el("td", { class: "num", text: r.dof === null ? "∞" : num(r.dof, "", 3) })))),
      el("tfoot", {}, el("tr", {}, el("td", { colspan: "7",
        text: `combined u ${num(b.u_combined, u, 3)}, effective dof ${b.dof_effective === null ? "∞" : num(b.dof_effective, "", 3)}` +
              `, k ${num(b.k, "", 3)}, U ${num(b.U, u, 3)} (at reading ${xText(b.x)}, where U is largest)` }))));
  }

  function show(rec) {
    const box = document.getElementById("calibration-record");
    const s = rec.interval_suggestion;
    const cond = Object.entries(rec.conditions.values).map(([k, v]) => `${k} = ${v}`).join("; ");
    const fit = rec.fit;
    box.dataset.record = String(rec.id);
    box.replaceChildren(
      el("h3", { text: `Calibration record ${rec.id}` }),
      el("dl", { class: "facts" },
        el("dt", { text: "done (UTC)" }), el("dd", { text: CK.when(rec.at) }),
        el("dt", { text: "by" }), el("dd", { text: rec.by || "–" }),
        el("dt", { text: "references" }), el("dd", { text: rec.references.map((r) => `${r.id} (certificate ${r.certificate}, due ${r.due_on}${r.overdue ? ", overdue: allowed" : ""})`).join("; ") || "none named" }),
        el("dt", { text: "decision rule" }), el("dd", { text: RULES[rec.decision_rule] || rec.decision_rule }),
        el("dt", { text: "verdict" }), el("dd", {}, "as found ", verdict(rec.as_found_verdict), ", as left ",
                                          verdict(rec.verdict)),
        el("dt", { text: "fit" }), el("dd", { text: `${fit.n} points, ${fit.dof} degrees of freedom, residual s.d. ` +
          `${num(fit.residual_sd, state.unit, 3)}; coefficients ${fit.coefficients.map((c) => num(c, "", 6)).join(", ")}` }),
        el("dt", { text: "conditions" }), el("dd", { text: [cond, rec.conditions.note].filter(Boolean).join(" · ") || "–" }),
        el("dt", { text: "next interval" }), el("dd", { text: `${s.days} days suggested (now ${s.current_days}; ` +
          `${s.basis.replace(/_/g, " ")}); applied only when the channel's interval is changed` }),
        ...(rec.supersedes ? [el("dt", { text: "corrects" }), el("dd", { text: `record ${rec.supersedes}` })] : []),
        ...(rec.superseded_by ? [el("dt", { text: "corrected by" }), el("dd", { text: `record ${rec.superseded_by}` })] : [])),
      el("h4", { text: "As found (the curve before the fit)" }), el("div", { class: "table-wrap" }, pointTable("record-as-found", rec.as_found)),
      el("h4", { text: "As left (the fitted curve)" }), el("div", { class: "table-wrap" }, pointTable("record-as-left", rec.as_left)),
      el("h4", { text: "Uncertainty budget (GUM)" }), el("div", { class: "table-wrap" }, budgetTable(rec.budget)));
    box.hidden = false;
  }

  function render() {
    const rows = state.records.slice().reverse().map((r) => el("tr", { "data-record": r.id },
      el("td", { class: "num", text: String(r.id) }),
      el("td", { text: CK.when(r.at) }),
      el("td", { text: r.by || "–" }),
      el("td", { text: r.decision_rule }),
      el("td", {}, verdict(r.as_found_verdict)),
      el("td", {}, verdict(r.verdict)),
      el("td", { text: r.superseded_by ? `corrected by ${r.superseded_by}` : r.supersedes ? `corrects ${r.supersedes}` : "" }),
      el("td", {}, el("button", { type: "button", class: "small quiet", text: "View", "data-record": r.id,
                                  onclick: () => show(r) }))));
    const tbody = document.querySelector("#calibration-table tbody");
    if (!rows.length) rows.push(el("tr", {}, el("td", { colspan: "8", text: "No calibration recorded yet." })));
    tbody.replaceChildren(...rows);
  }

  async function load(base, unit) {
    Object.assign(state, { base, unit });
    state.records = await CK.all(`${base}/calibrations`, 1000, 20);
    render();
    const open = document.getElementById("calibration-record").dataset.record;
    const again = state.records.find((r) => String(r.id) === open);
    if (again) show(again);
  }

  return { load };
})();
