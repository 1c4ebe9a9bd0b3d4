"use strict";
// attention first, then the rest, then archived channels (only with "show archived"); within
// each, the soonest forecast to leave tolerance first: the order CK.byRank gives, the same as
// the command line's
const REFRESH_MS = 30000;
const { rank, ATTENTION } = CK;

async function loadFleet() {
  const prefix = document.getElementById("prefix").value.trim();
  const state = document.getElementById("state").value;
  const archived = document.getElementById("show-archived").checked;
  const dueState = document.getElementById("due-state").value;
  const summary = document.getElementById("fleet-summary");
  const tbody = document.querySelector("#fleet-table tbody");
  const q = new URLSearchParams();
  if (prefix) q.set("prefix", prefix);
  if (state) q.set("state", state);
  if (archived) q.set("archived", "include");
  if (dueState) q.set("due_state", dueState);
  summary.textContent = "Loading …";
  if (!tbody.children.length) {
    tbody.replaceChildren(CK.el("tr", { class: "loading" }, CK.el("td", { colspan: "9", text: "Loading the channels …" })));
  }
  let items;
  try {
    items = await CK.all("/v1/channels" + (q.toString() ? "?" + q : ""));
  } catch (e) {
    summary.textContent = `Could not load the channels: ${e.message}`;
    return;
  }
  items.sort(CK.byRank);
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
    if (ch.stale) drift.push(" ", CK.badge("stale"));
    if (ch.archived) drift.unshift(CK.badge("archived"), " ");
    const cls = ch.archived ? "archived" : rank(ch) < ATTENTION ? "attention" : "";
    return el("tr", { class: cls, "data-channel": ch.id },
      el("td", {}, el("a", { href: "/ui/channels/" + encodeURIComponent(ch.id), text: ch.id })),
      el("td", {}, ...drift),
      el("td", {}, tol),
      el("td", {}, ...(ch.due_on ? [CK.badge(ch.due_state), " ", el("small", { text: ch.due_on })]
                               : [el("span", { class: "state state-none", text: "never calibrated" })])),
      el("td", {}, el("small", { class: "forecast", text: CK.forecastText(ch.forecast, unit) })),
      el("td", { text: CK.when(ch.last_sample_at) }),
      el("td", { class: "num", text: `${ch.n_samples}` + (ch.n_rejected ? ` (+${ch.n_rejected} held back)` : "") }),
      el("td", { class: "num", text: num(ch.rmse, unit, 3) }),
      el("td", { text: ch.description || "" }));
  }));
  const attention = items.filter((c) => rank(c) < ATTENTION).length;
  const retired = items.filter((c) => c.archived).length;
  summary.textContent = `${items.length} channel${items.length === 1 ? "" : "s"}` +
    (archived ? ` (${retired} archived, listed last)` : "") +
    (attention ? `, ${attention} needing attention (listed first)` : ", none needing attention") +
    ` · updated ${new Date().toLocaleTimeString()}, every ${REFRESH_MS / 1000} s`;
}

document.addEventListener("DOMContentLoaded", () => {
  if (!CK.key()) { location.assign("/ui/"); return; }
  document.getElementById("filters").addEventListener("submit", (ev) => { ev.preventDefault(); loadFleet(); });
  document.getElementById("state").addEventListener("change", loadFleet);
  document.getElementById("show-archived").addEventListener("change", loadFleet);
  document.getElementById("due-state").addEventListener("change", loadFleet);
  loadFleet();
  // keep the list current while the page is in view
  setInterval(() => { if (document.visibilityState === "visible") loadFleet(); }, REFRESH_MS);
});
