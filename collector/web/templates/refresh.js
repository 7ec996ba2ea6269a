// Re-fetch this same page every few seconds and swap in its <main>: the server renders every view,
// so the script formats nothing itself and the page stays whole if it never runs.
(function () {
  "use strict";
  if (!(REFRESH_MS > 0)) return;
  const flag = document.getElementById("refresh-state");
  async function refresh() {
    // Leave the page alone while someone reads a tooltip-free detail or has focus inside it.
    const open = Array.from(document.querySelectorAll("details[open]")).map((d) => d.id).filter(Boolean);
    try {
      const ctl = new AbortController();
      const timer = setTimeout(() => ctl.abort(), 4000);
      const res = await fetch(location.href, {cache: "no-store", signal: ctl.signal});
      clearTimeout(timer);
      if (!res.ok) throw new Error(`HTTP ${res.status}`);
      const doc = new DOMParser().parseFromString(await res.text(), "text/html");
      const main = doc.getElementById("main");
      if (!main) throw new Error("no content");
      document.getElementById("main").innerHTML = main.innerHTML;
      for (const id of open) { const d = document.getElementById(id); if (d) d.open = true; }
      document.getElementById("generated").textContent = doc.getElementById("generated").textContent;
      flag.textContent = ""; flag.className = "";
    } catch (err) {
      flag.textContent = `· not updating (${err.message || err})`; flag.className = "stale";
    }
  }
  setInterval(refresh, REFRESH_MS);
})();
