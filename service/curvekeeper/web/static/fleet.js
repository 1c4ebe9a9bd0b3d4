"use strict";
// attention first: a damaged state, an alarm, out of service, out of tolerance, a warning; then the rest;
// within each, the soonest forecast to leave tolerance first
const REFRESH_MS = 30000;
function rank(ch) {
  const d = ch.drift || {};
  if (ch.state === "damaged") return 0;
  if (d.state === "alarm") return 1;
  if (ch.service_state === "out_of_service") return 2;
  if (d.tolerance_state === "out_of_tolerance") return 3;
  if (d.state === "warning") return 4;
  return 5;
}
const ATTENTION = 5;

async function loadFleet() {
  const prefix = document.getElementById("prefix").value.trim();
  const state = document.getElementById("state").value;
  const summary = document.getElementById("fleet-summary");
  const tbody = document.querySelector("#fleet-table tbody");
  const q = new URLSearchParams();
  if (prefix) q.set("prefix", prefix);
  if (state) q.set("state", state);
  summary.textContent = "Loading …";
  if (!tbody.children.length) {
    tbody.replaceChildren(CK.el("tr", { class: "loading" }, CK.el("td", { colspan: "8", text: "Loading the channels …" })));
  }
  let items;
  try {
    items = await CK.all("/v1/channels" + (q.toString() ? "?" + q : ""));
  } catch (e) {
    summary.textContent = `Could not load the channels: ${e.message}`;
    return;
  }
  const soon = (ch) => CK.forecastKey(ch.forecast);
  items.sort((a, b) => rank(a) - rank(b) || (soon(a) - soon(b) || 0) || a.id.localeCompare(b.id));
  const { el, num } = CK;
  tbody.replaceChildren(...items.map((ch) => {
    const d = ch.drift || {};
    const unit = (ch.output && ch.output.unit) || "";
    const tol = d.tolerance_state
      ? [CK.badge(d.tolerance_state), " ", el("small", { text: `${num(d.max_curve_change, unit, 3)} of ${num(d.tolerance, unit, 3)}` })]
      : [CK.badge(null)];
    const drift = ch.state === "damaged" ? [CK.badge("damaged")]
      : [CK.badge(d.state), " ", el("small", { text: `statistic ${num(d.statistic, "", 3)} of ${num(d.alarm, "", 3)}` })];
    if (ch.service_state === "out_of_service") drift.push(" ", CK.badge("out_of_service"));
    return el("tr", { class: rank(ch) < ATTENTION ? "attention" : "", "data-channel": ch.id },
      el("td", {}, el("a", { href: "/ui/channels/" + encodeURIComponent(ch.id), text: ch.id })),
      el("td", {}, ...drift),
      el("td", {}, tol),
      el("td", {}, el("small", { class: "forecast", text: CK.forecastText(ch.forecast, unit) })),
      el("td", { text: CK.when(ch.last_sample_at) }),
      el("td", { class: "num", text: `${ch.n_samples}` + (ch.n_rejected ? ` (+${ch.n_rejected} held back)` : "") }),
      el("td", { class: "num", text: num(ch.rmse, unit, 3) }),
      el("td", { text: ch.description || "" }));
  }));
  const attention = items.filter((c) => rank(c) < ATTENTION).length;
  summary.textContent = `${items.length} channel${items.length === 1 ? "" : "s"}` +
    (attention ? `, ${attention} needing attention (listed first)` : ", none needing attention") +
    ` · updated ${new Date().toLocaleTimeString()}, every ${REFRESH_MS / 1000} s`;
}

document.addEventListener("DOMContentLoaded", () => {
  if (!CK.key()) { location.assign("/ui/"); return; }
  document.getElementById("filters").addEventListener("submit", (ev) => { ev.preventDefault(); loadFleet(); });
  document.getElementById("state").addEventListener("change", loadFleet);
  loadFleet();
  // keep the list current while the page is in view
  setInterval(() => { if (document.visibilityState === "visible") loadFleet(); }, REFRESH_MS);
});
