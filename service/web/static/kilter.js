// kilter dashboard: small progressive enhancements; every page works without this file.
"use strict";

// Threshold preview form: show only the inputs of the chosen way (value or budget).
document.addEventListener("DOMContentLoaded", () => {
  const form = document.getElementById("preview-form");
  if (!form) return;
  const sync = () => {
    const chosen = form.querySelector('input[name="by"]:checked');
    const by = chosen ? chosen.value : "level";
    form.querySelectorAll("[data-by]").forEach((field) => {
      const on = field.dataset.by === by;
      field.hidden = !on;
      field.querySelectorAll("input").forEach((input) => { input.disabled = !on; });
    });
  };
  form.querySelectorAll('input[name="by"]').forEach((radio) => radio.addEventListener("change", sync));
  sync();
});

// Live refresh: the alert list and the alert page fetch their changing parts (rendered by
// the server with the page's own templates) every few seconds and swap in what changed;
// "Updated hh:mm" says when the last answer came. Paused while the tab is hidden; stops
// with a note when the session has ended.
document.addEventListener("DOMContentLoaded", () => {
  const status = document.getElementById("live-status");
  if (!status || !window.fetch) return;
  const src = status.dataset.liveSrc;
  const everyMs = Math.max(1, Number(status.dataset.liveEvery) || 15) * 1000;
  const facts = document.getElementById("live-facts");
  const loadedState = facts ? facts.dataset.state : null;
  let timer = null;
  let stopped = false;

  const apply = (data) => {
    Object.entries(data.parts || {}).forEach(([id, html]) => {
      const el = document.getElementById(id);
      if (el && el.innerHTML.trim() !== html.trim()) el.innerHTML = html;
    });
    const when = document.getElementById("live-updated");
    if (when && data.updated) when.textContent = data.updated;
    const changed = document.getElementById("live-changed");
    if (changed && loadedState && data.state && data.state !== loadedState) changed.hidden = false;
  };

  const tick = async () => {
    timer = null;
    if (stopped) return;
    if (document.hidden) { schedule(); return; }
    try {
      const r = await fetch(src, { credentials: "same-origin", headers: { Accept: "application/json" } });
      if (r.status === 401 || r.status === 403) {
        stopped = true;
        status.textContent = "Your session has ended: reload the page to see new alerts.";
        return;
      }
      if (r.ok) apply(await r.json());
    } catch (e) {
      // The service may be restarting: keep the page and try again on the next tick.
    }
    schedule();
  };
  const schedule = () => { if (!stopped && timer === null) timer = setTimeout(tick, everyMs); };
  document.addEventListener("visibilitychange", () => { if (!document.hidden && timer === null) tick(); });
  schedule();
});

// A hint above a table or chart that is wider than its box (phones): "swipe sideways".
document.addEventListener("DOMContentLoaded", () => {
  const boxes = () => document.querySelectorAll("[data-scroll-hint]");
  const sync = () => {
    boxes().forEach((box) => {
      let hint = box.previousElementSibling;
      if (!hint || !hint.classList.contains("scroll-hint")) {
        hint = document.createElement("p");
        hint.className = "scroll-hint";
        hint.textContent = box.dataset.scrollHint;
        box.parentNode.insertBefore(hint, box);
      }
      hint.classList.toggle("shown", box.scrollWidth > box.clientWidth + 1);
    });
  };
  sync();
  window.addEventListener("resize", sync);
  // The live refresh may swap a table in: check again when the list changes.
  const live = document.getElementById("live-table");
  if (live && window.MutationObserver) new MutationObserver(sync).observe(live, { childList: true });
});
