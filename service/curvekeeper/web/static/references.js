"use strict";
// the reference instruments: list with due state (overdue first), add one, retire one
const DUE_WORDS = { overdue: "overdue", due_soon: "due soon", ok: "ok" };
const DUE_CLASS = { overdue: "state-alarm", due_soon: "state-warning", ok: "state-ok" };
const DUE_RANK = { overdue: 0, due_soon: 1, ok: 2 };

function dueBadge(ref) {
  if (ref.retired) return CK.el("span", { class: "state state-none", text: "retired" });
  return CK.el("span", { class: `state ${DUE_CLASS[ref.due_state]}`, text: DUE_WORDS[ref.due_state] });
}

function statedAs(ref) {
  const { num } = CK;
  if (ref.distribution === "normal") {
    return `U = ${num(ref.expanded_uncertainty, ref.unit)}, k = ${num(ref.coverage_factor)}`;
  }
  return `±${num(ref.half_width, ref.unit)}, ${ref.distribution}`;
}

async function loadRefs() {
  const due = document.getElementById("due-filter").value;
  const retired = document.getElementById("show-retired").checked;
  const summary = document.getElementById("ref-summary");
  const tbody = document.querySelector("#ref-table tbody");
  const q = new URLSearchParams();
  if (due) q.set("due_state", due);
  if (!retired) q.set("retired", "false");
  summary.textContent = "Loading …";
  let items;
  try {
    items = await CK.all("/v1/references?" + q);
  } catch (e) {
    summary.textContent = `Could not load the references: ${e.message}`;
    return;
  }
  items.sort((a, b) => (a.retired - b.retired) || DUE_RANK[a.due_state] - DUE_RANK[b.due_state] ||
    a.due_on.localeCompare(b.due_on) || a.id.localeCompare(b.id));
  const { el, num } = CK;
  tbody.replaceChildren(...items.map((r) => el("tr",
    { class: !r.retired && r.due_state !== "ok" ? "attention" : "", "data-reference": r.id },
    el("td", { text: r.id }),
    el("td", {}, dueBadge(r)),
    el("td", { text: r.due_on }),
    el("td", { class: "num", text: num(r.standard_uncertainty, r.unit) }),
    el("td", { text: statedAs(r) }),
    el("td", { text: r.certificate }),
    el("td", { text: r.calibrated_on }),
    el("td", { text: r.description || "" }),
    el("td", {}, r.retired ? "" : el("button", { type: "button", class: "small danger", text: "Retire",
                                                  "data-retire": r.id, onclick: () => askRetire(r.id) })))));
  const late = items.filter((r) => !r.retired && r.due_state !== "ok").length;
  summary.textContent = `${items.length} reference${items.length === 1 ? "" : "s"}` +
    (late ? `, ${late} overdue or due soon (listed first)` : "");
}

function numberOf(id) {
  const text = document.getElementById(id).value.trim();
  const v = Number(text);
  return text === "" || !Number.isFinite(v) ? null : v;
}

async function createRef(ev) {
  ev.preventDefault();
  const msg = document.getElementById("ref-message");
  const kind = document.getElementById("ref-form-kind").value;
  const value = numberOf("ref-value");
  if (value === null) { CK.say(msg, "The value must be a number.", "error"); return; }
  const body = {
    id: document.getElementById("ref-id").value.trim(),
    description: document.getElementById("ref-description").value,
    unit: document.getElementById("ref-unit").value,
    certificate: document.getElementById("ref-certificate").value,
    calibrated_on: document.getElementById("ref-calibrated").value,
    due_on: document.getElementById("ref-due").value,
    note: document.getElementById("ref-note").value,
  };
  if (kind === "expanded") {
    body.expanded_uncertainty = value;
    const k = numberOf("ref-k");
    if (k !== null) body.coverage_factor = k;
  } else if (kind === "standard") {
    body.standard_uncertainty = value;
  } else {
    body.distribution = kind;
    body.half_width = value;
  }
  try {
    const ref = await CK.api("POST", "/v1/references", body);
    CK.say(msg, `Added ${ref.id}: u = ${CK.num(ref.standard_uncertainty, ref.unit)}, ${DUE_WORDS[ref.due_state]}.`,
      "done");
    document.getElementById("ref-form").reset();
    loadRefs();
  } catch (e) {
    CK.say(msg, `Not added: ${e.message}`, "error");
  }
}

function askRetire(id) {
  document.getElementById("retire-id").textContent = id;
  document.getElementById("retire-note").value = "";
  document.getElementById("retire-dialog").showModal();
}

async function retire() {
  const dialog = document.getElementById("retire-dialog");
  const id = document.getElementById("retire-id").textContent;
  const note = document.getElementById("retire-note").value.trim();
  const msg = document.getElementById("ref-summary");
  try {
    await CK.api("PATCH", "/v1/references/" + encodeURIComponent(id), note ? { retired: true, note } : { retired: true });
    dialog.close();
    await loadRefs();
    CK.say(msg, `Retired ${id}.`, "done");
  } catch (e) {
    dialog.close();
    CK.say(msg, `Not retired: ${e.message}`, "error");
  }
}

document.addEventListener("DOMContentLoaded", () => {
  if (!CK.key()) { location.assign("/ui/"); return; }
  document.getElementById("ref-filters").addEventListener("submit", (ev) => { ev.preventDefault(); loadRefs(); });
  document.getElementById("due-filter").addEventListener("change", loadRefs);
  document.getElementById("show-retired").addEventListener("change", loadRefs);
  document.getElementById("ref-form").addEventListener("submit", createRef);
  document.getElementById("retire-cancel").addEventListener("click", () => document.getElementById("retire-dialog").close());
  document.getElementById("retire-confirm").addEventListener("click", retire);
  loadRefs();
});
