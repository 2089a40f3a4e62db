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
