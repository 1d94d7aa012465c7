// Small enhancements; every page works without them.
// - Forms with data-confirm ask before submitting (deleting, revoking).
// - Buttons with data-copy copy the text of the named element (new secrets).
"use strict";
document.addEventListener("submit", (ev) => {
  const form = ev.target;
  const question = form instanceof HTMLFormElement ? form.dataset.confirm : undefined;
  if (question && !window.confirm(question)) {
    ev.preventDefault();
  }
});
document.addEventListener("DOMContentLoaded", () => {
  for (const button of document.querySelectorAll("button[data-copy]")) {
    const target = document.getElementById(button.dataset.copy);
    if (!target || !navigator.clipboard) continue;
    button.hidden = false;
    button.addEventListener("click", () => {
      navigator.clipboard.writeText(target.textContent.trim()).then(() => {
        button.textContent = "Copied";
      });
    });
  }
});
