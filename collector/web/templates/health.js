// Redraw the tables from /v1/status; the server-rendered page stays usable if this never runs.
(function () {
  "use strict";
  const table = document.getElementById("boards");
  const LABELS = JSON.parse(table.dataset.labels);
  const esc = (s) => String(s).replace(/[&<>"']/g, (c) => ({"&": "&amp;", "<": "&lt;", ">": "&gt;", '"': "&quot;", "'": "&#39;"}[c]));
  // Same wording as the server's fmt_clock_error: "0.3 s", "−4 min 10 s", "−3 h 12 min".
  const clockError = (s) => {
    if (s === null || s === undefined) return "–";
    const sign = s < 0 ? "−" : "", a = Math.abs(s);
    if (a < 60) return num(s, " s", 1).replace("-", "−");
    if (a < 3600) return `${sign}${Math.floor(a / 60)} min ${Math.round(a % 60)} s`;
    return `${sign}${Math.floor(a / 3600)} h ${Math.round((a % 3600) / 60)} min`;
  };
  const num = (v, unit, digits) => {
    if (v === null || v === undefined) return "–";
    if (Number.isInteger(v) && digits === undefined) return v.toLocaleString("en-US") + (unit || "");
    const d = digits ?? 1;
    if (Math.abs(v) < 0.5 * Math.pow(10, -d)) v = 0;  // no "-0.00"
    return v.toLocaleString("en-US", {minimumFractionDigits: d, maximumFractionDigits: d}) + (unit || "");
  };
  const evNote = (e) => !e.detail ? "" : e.kind === "loss" && e.detail.first_seq !== undefined
    ? ` batches ${e.detail.first_seq}–${e.detail.last_seq} lost` : e.detail.new ? " → " + e.detail.new : "";
  const evText = (e) => e.kind === "state_changed" && e.detail && e.detail.new ? "→ " + e.detail.new : e.kind;
  const age = (s) => s === null || s === undefined ? "never" : s < 90 ? `${s.toFixed(0)} s ago`
    : s < 5400 ? `${(s / 60).toFixed(0)} min ago` : s < 172800 ? `${(s / 3600).toFixed(1)} h ago` : `${(s / 86400).toFixed(0)} d ago`;
  const badge = (state, reason) => {
    const [text, sym] = LABELS[state] || [state, "?"];
    const title = reason ? ` title="${esc(reason)}"` : "";
    return `<span class="state s-${esc(state)}"${title}><span aria-hidden="true">${sym}</span> ${esc(text)}</span>`;
  };
  const row = (r) => `<tr data-board="${esc(r.name)}" data-state="${esc(r.state)}">` +
    `<th scope="row">${esc(r.name)}</th><td>${esc(r.room)}</td><td>${r.floor === null ? "–" : esc(r.floor)}</td>` +
    `<td class="st">${badge(r.state, r.state_reason)}</td><td class="age num">${age(r.last_contact_age_s)}</td>` +
    `<td class="num readings">${num(r.readings_total)}</td><td class="num rate">${num(r.readings_per_s, "/s", 1)}</td>` +
    `<td class="num tagrate"${r.tags_heard === null || r.tags_heard === undefined ? "" : ` title="median over ${r.tags_heard} tags heard recently"`}>` +
    `${num(r.tag_rate_hz_median, " Hz", 2)}</td>` +
    `<td class="num">${num(r.clock_skew_ppm, " ppm", 2)}</td><td class="num">${num(r.clock_residual_ms, " ms", 2)}</td>` +
    `<td class="num">${r.wall_error_ms === null ? "–" : clockError(r.wall_error_ms / 1000)}</td>` +
    `<td class="num">${num(r.spool_backlog_batches)}</td><td class="num">${num(r.adverts_total)}</td>` +
    `<td>${r.last_event ? esc(evText(r.last_event)) : "–"}</td></tr>`;
  const clock = (t) => new Date(t * 1000).toISOString().slice(11, 19);
  async function refresh() {
    const flag = document.getElementById("refresh-state");
    try {
      const ctl = new AbortController();
      const timer = setTimeout(() => ctl.abort(), 4000);
      const res = await fetch("/v1/status", {cache: "no-store", signal: ctl.signal});
      clearTimeout(timer);
      if (!res.ok) throw new Error(`HTTP ${res.status}`);
      const doc = await res.json();
      table.tBodies[0].innerHTML = doc.boards.map(row).join("");
      document.getElementById("boards-total").textContent = doc.fleet.boards;
      document.getElementById("readings-total").textContent = doc.fleet.readings_total.toLocaleString("en-US");
      document.getElementById("tags-total").textContent = doc.fleet.tags;
      document.getElementById("summary").innerHTML = Object.keys(doc.fleet.by_state).sort()
        .map((s) => `<li>${badge(s, null)} <b>${doc.fleet.by_state[s]}</b></li>`).join("");
      document.getElementById("events").innerHTML = doc.events.map((e) =>
        `<li><time>${clock(e.at)}</time> <b>${esc(e.board || "collector")}</b> ${esc(e.kind)}` +
        esc(evNote(e)) +
        `${e.detail && e.detail.reason ? " <span class=why>" + esc(e.detail.reason) + "</span>" : ""}</li>`).join("") || "<li>no events yet</li>";
      document.getElementById("generated").textContent = new Date(doc.at * 1000).toISOString().replace("T", " ").slice(0, 19) + " UTC";
      flag.textContent = ""; flag.className = "";
    } catch (err) {
      flag.textContent = `· not updating (${err.message || err})`; flag.className = "stale";
    }
  }
  setInterval(refresh, REFRESH_MS);
})();
