// The desk's only script (no inline script anywhere: the Content-Security-Policy forbids it).
// 1. Patient list: fills the "probable changes" and "drift" cells of the rows on screen from
//    /api/summaries (the server assesses them with the report's rules), a few rows per request.
// 2. Patient page: choosing another specimen reassesses at once.
// 3. Import: warns before sending a file larger than the desk's upload limit.
// Text is set with textContent only, never as markup.
"use strict";

function fillSummaries() {
  const cells = Array.from(document.querySelectorAll("td.summary.pending"));
  const ids = Array.from(new Set(cells.map((c) => c.dataset.patient)));
  const chunk = 10;
  for (let i = 0; i < ids.length; i += chunk) {
    const part = ids.slice(i, i + chunk);
    const query = part.map((id) => "id=" + encodeURIComponent(id)).join("&");
    fetch("/api/summaries?" + query, { credentials: "same-origin" })
      .then((r) => (r.ok ? r.json() : Promise.reject(r.status)))
      .then((data) => cells.forEach((cell) => showSummary(cell, data[cell.dataset.patient])))
      .catch(() => part.forEach((id) => cells
        .filter((c) => c.dataset.patient === id)
        .forEach((c) => { c.textContent = "?"; c.title = "could not be worked out"; })));
  }
}

function showSummary(cell, s) {
  if (!s) { return; }
  cell.classList.remove("pending");
  if (cell.dataset.kind === "changes") {
    if (s.changes === null) {
      cell.textContent = "n/a";
      cell.title = s.error || "";
    } else {
      cell.textContent = String(s.changes);
      if (s.changes > 0) { cell.classList.add("has-changes"); }
    }
  } else if (s.drift && s.drift.length) {
    const mark = document.createElement("span");
    mark.className = "drift";
    mark.textContent = "drift";
    cell.textContent = "";
    cell.appendChild(mark);
    cell.title = s.drift.join(" ");
  } else {
    cell.textContent = "\u2013";
  }
}

function autoSubmit() {
  document.querySelectorAll("select[data-autosubmit]").forEach((sel) => {
    sel.addEventListener("change", () => sel.form.submit());
  });
}

function uploadLimit() {
  const input = document.querySelector("input[type=file][data-limit-bytes]");
  if (!input) { return; }
  const warning = document.getElementById("size-warning");
  input.addEventListener("change", () => {
    const limit = Number(input.dataset.limitBytes);
    const big = input.files.length > 0 && input.files[0].size > limit;
    if (warning) { warning.hidden = !big; }
  });
}

document.addEventListener("DOMContentLoaded", () => {
  fillSummaries();
  autoSubmit();
  uploadLimit();
});
