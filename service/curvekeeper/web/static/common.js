// curvekeeper pages: the API key lives in sessionStorage only and travels as a Bearer header.
"use strict";
const CK = (() => {
  const STORE = "curvekeeper.key";
  const key = () => sessionStorage.getItem(STORE);
  const setKey = (k) => sessionStorage.setItem(STORE, k);
  const signOut = () => { sessionStorage.removeItem(STORE); location.assign("/ui/"); };

  class ApiError extends Error {
    constructor(status, body) {
      const e = (body && body.error) || {};
      super(e.message || `the service answered ${status}`);
      this.status = status; this.code = e.code || "http_" + status; this.details = e.details;
    }
  }

  async function api(method, path, body, opts = {}) {
    const k = opts.key || key();
    if (!k) { location.assign("/ui/"); throw new ApiError(401, null); }
    const init = { method, headers: { "Authorization": "Bearer " + k, "Accept": "application/json" },
                   cache: "no-store", credentials: "omit", referrerPolicy: "no-referrer" };
    if (body !== undefined) { init.headers["Content-Type"] = "application/json"; init.body = JSON.stringify(body); }
    const r = await fetch(path, init);
    let data = null;
    try { data = await r.json(); } catch (_) { data = null; }
    if (r.status === 401 && !opts.key) { sessionStorage.removeItem(STORE); location.assign("/ui/?signed_out=1"); }
    if (!r.ok) throw new ApiError(r.status, data);
    return data;
  }

  async function all(path, limit = 1000, maxPages = 50) {
    const items = [];
    let cursor = null;
    for (let i = 0; i < maxPages; i++) {
      const sep = path.includes("?") ? "&" : "?";
      const page = await api("GET", `${path}${sep}limit=${limit}` + (cursor ? `&cursor=${encodeURIComponent(cursor)}` : ""));
      items.push(...page.items);
      cursor = page.next_cursor;
      if (!cursor) break;
    }
    return items;
  }

  // element builder: text always goes through textContent, never HTML
  function el(tag, attrs = {}, ...children) {
    const e = document.createElement(tag);
    for (const [k, v] of Object.entries(attrs)) {
      if (v === null || v === undefined || v === false) continue;
      if (k === "class") e.className = v;
      else if (k === "text") e.textContent = v;
      else if (k.startsWith("on")) e.addEventListener(k.slice(2), v);
      else e.setAttribute(k, v === true ? "" : String(v));
    }
    for (const c of children.flat()) {
      if (c === null || c === undefined) continue;
      e.append(c instanceof Node ? c : document.createTextNode(String(c)));
    }
    return e;
  }

  // text for a plot: plotly draws a subset of HTML in titles and legend names (a name holding
  // <a href=...> would become a live link) and turns &amp; &lt; &gt; back into characters;
  // outside a tag nothing else is markup to it
  const PLOT_ENTITIES = { "&": "&amp;", "<": "&lt;", ">": "&gt;" };
  function plotText(s) {
    return String(s).replace(/[&<>]/g, (c) => PLOT_ENTITIES[c]);
  }

  // a number with its unit; significant digits, not a fixed number of decimals
  function num(v, unit, digits = 4) {
    if (v === null || v === undefined || Number.isNaN(v)) return "–";
    const a = Math.abs(v);
    let s;
    if (a !== 0 && (a < 1e-3 || a >= 1e6)) s = v.toExponential(digits - 1);
    else s = Number(v.toPrecision(digits)).toString();
    return unit ? `${s} ${unit}` : s;
  }

  // the display rule shared with the command line (curvekeeper/display.py, which says it
  // in full): times in UTC as YYYY-MM-DD HH:MM:SS, the fraction cut off; a time without a
  // zone is UTC (a browser would take it as local time)
  function when(iso) {
    if (!iso) return "–";
    const text = String(iso);
    const d = new Date(/T\d\d:\d\d(:\d\d(\.\d+)?)?$/.test(text) ? text + "Z" : text);
    if (Number.isNaN(d.getTime())) return text;
    return d.toISOString().replace("T", " ").replace(/\.\d+Z$/, "").replace(/Z$/, "");
  }

  // channel order, shared with the command line (curvekeeper/display.py): attention first
  // (a damaged state, an alarm, out of service, out of tolerance, stale, a warning, a
  // calibration overdue), then the rest, then archived channels; within a rank the soonest
  // forecast to leave tolerance first, then by id, in plain character order
  const ATTENTION = 7;
  function rank(ch) {
    const d = ch.drift || {};
    if (ch.archived) return 8;
    if (ch.state === "damaged") return 0;
    if (d.state === "alarm") return 1;
    if (ch.service_state === "out_of_service") return 2;
    if (d.tolerance_state === "out_of_tolerance") return 3;
    if (ch.stale) return 4;
    if (d.state === "warning") return 5;
    if (ch.due_state === "overdue") return 6;
    return ATTENTION;
  }
  function byRank(a, b) {
    const soon = forecastKey(a.forecast) - forecastKey(b.forecast);
    return rank(a) - rank(b) || (soon || 0) || (a.id < b.id ? -1 : a.id > b.id ? 1 : 0);
  }

  const STATE_WORDS = { ok: "ok", warning: "drift warning", alarm: "drift alarm",
                        out_of_tolerance: "out of tolerance", out_of_service: "out of service", in_service: "in service",
                        damaged: "state damaged", archived: "archived", due_soon: "due soon", overdue: "overdue",
                        stale: "stale" };
  function badge(state) {
    if (!state) return el("span", { class: "state state-none", text: "not checked" });
    return el("span", { class: `state state-${state}`, text: STATE_WORDS[state] || state });
  }

  // the channel's forecast of when it leaves tolerance, in words (one owner: fleet and channel pages)
  function forecastText(f, unit, long = false) {
    if (!f) return "no forecast";
    const rate = `drift ${num(f.rate, unit ? unit + "/day" : "/day", 2)}`;
    if (f.not_within_days !== null) return `not within ${f.not_within_days} days (${rate})`;
    const day = (iso) => (iso ? iso.slice(0, 10) : "not bounded");
    const on = f.leaves_tolerance_on ? day(f.leaves_tolerance_on) : "not expected (no rising trend)";
    const interval = f.low || f.high ? `interval ${day(f.low)} to ${day(f.high)}` : "interval not bounded by the data";
    const text = `${on}, ${interval} (${rate})`;
    return long ? `${text}; ${f.n_points} trace points; ${f.method}` : text;
  }
  // forecast date as a sort key: soonest first, no date last
  function forecastKey(f) {
    const iso = f && f.not_within_days === null ? (f.leaves_tolerance_on || f.low) : null;
    return iso ? Date.parse(iso) : Infinity;
  }

  function say(node, text, kind = "") {
    node.textContent = text;
    node.className = "message" + (kind ? " " + kind : "");
  }

  document.addEventListener("DOMContentLoaded", () => {
    const out = document.getElementById("signout");
    if (out) out.addEventListener("click", signOut);
  });

  return { key, setKey, signOut, api, all, el, num, when, rank, byRank, ATTENTION, badge, say, plotText,
           forecastText, forecastKey, ApiError };
})();
