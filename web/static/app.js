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
// The line page's timeline: a slider over every processed epoch that swaps
// the section figures (and moves the epoch mark on the site's series charts)
// while dragging and opens the epoch's page when
// released; the left and right arrow keys step to the earlier or later epoch.
document.addEventListener("DOMContentLoaded", () => {
  const nav = document.querySelector("nav.timeline[data-epochs]");
  if (!nav) return;
  const ids = nav.dataset.epochs.split(",");
  const line = nav.dataset.line;
  const at = ids.indexOf(nav.dataset.current);
  if (ids.length < 2 || at < 0) return;
  const figures = document.querySelectorAll("img[data-kind]");
  const series = document.querySelectorAll("img[data-series]");
  const label = document.createElement("label");
  label.htmlFor = "epoch-slider";
  label.textContent = "Scrub through the season";
  label.className = "sr-only";
  const slider = document.createElement("input");
  slider.type = "range";
  slider.id = "epoch-slider";
  slider.min = "0";
  slider.max = String(ids.length - 1);
  slider.value = String(at);
  slider.setAttribute("aria-valuetext", `epoch ${at + 1} of ${ids.length}`);
  nav.append(label, slider);
  const url = (i) => `/lines/${encodeURIComponent(line)}?epoch=${ids[i]}#sections-h`;
  slider.addEventListener("input", () => {
    const i = Number(slider.value);
    slider.setAttribute("aria-valuetext", `epoch ${i + 1} of ${ids.length}`);
    for (const img of figures) {
      img.src = `/lines/${encodeURIComponent(line)}/epochs/${ids[i]}/section.svg?kind=${img.dataset.kind}`;
    }
    for (const img of series) {
      img.src = `/lines/${encodeURIComponent(line)}/series/${encodeURIComponent(img.dataset.series)}.svg?epoch=${ids[i]}`;
    }
  });
  slider.addEventListener("change", () => {
    window.location.assign(url(Number(slider.value)));
  });
  document.addEventListener("keydown", (ev) => {
    const t = ev.target;
    if (t instanceof HTMLInputElement || t instanceof HTMLTextAreaElement || t instanceof HTMLSelectElement) return;
    if (ev.altKey || ev.ctrlKey || ev.metaKey) return;
    const link = ev.key === "ArrowLeft" ? document.getElementById("epoch-prev")
      : ev.key === "ArrowRight" ? document.getElementById("epoch-next") : null;
    if (link) {
      ev.preventDefault();
      link.click();
    }
  });
});
