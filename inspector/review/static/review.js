// Keyboard and label buttons of the review page. No build step, no libraries.
(function () {
  "use strict";
  const token = document.querySelector('meta[name="review-token"]').content;
  const TEXT = {incident: "incident", false_alarm: "false alarm", unsure: "unsure", "": "to review"};
  const KEYS = {"1": "incident", "2": "false_alarm", "3": "unsure", "0": ""};

  function rows() { return Array.from(document.querySelectorAll("#items li.row")); }
  function currentRow() { return document.querySelector("#items li.current"); }

  function go(step) {
    const all = rows();
    if (!all.length) return;
    const cur = currentRow();
    let i = cur ? all.indexOf(cur) + step : 0;
    if (i < 0 || i >= all.length) return;
    window.location.assign(all[i].dataset.href);
  }

  function status(text, bad) {
    const el = document.getElementById("status");
    if (el) { el.textContent = text; el.className = bad ? "bad" : ""; }
  }

  // A write to the server (token-protected); resolves to the JSON answer, or throws an
  // Error whose message says why it was not done.
  async function write(url, body) {
    let resp;
    try {
      resp = await fetch(url, {
        method: "POST",
        headers: {"Content-Type": "application/json", "X-Review-Token": token},
        body: JSON.stringify(body),
      });
    } catch (err) {
      throw new Error("the review server did not answer");
    }
    let data = {};
    try { data = await resp.json(); } catch (e) { /* keep the status text */ }
    if (!resp.ok) throw new Error(data.error || resp.statusText);
    return data;
  }

  function paint(badge, label) {
    badge.textContent = TEXT[label];
    badge.dataset.label = label;
    badge.className = "badge b-" + (label || "none");
  }

  async function setLabel(label) {
    const box = document.getElementById("labelling");
    if (!box) return;
    const note = document.getElementById("note").value;
    status("saving…");
    try {
      await write("/api/label", {item: box.dataset.item, label: label || null, note: note});
    } catch (err) {
      status("not saved: " + err.message, true);
      return;
    }
    box.dataset.label = label;
    paint(document.getElementById("current-label"), label);
    const row = document.querySelector('#items li[data-item="' + box.dataset.item + '"]');
    if (row) paint(row.querySelector(".badge"), label);
    status("saved: " + TEXT[label]);
    if (label) setTimeout(function () { go(1); }, 300);
  }

  document.addEventListener("keydown", function (ev) {
    if (ev.ctrlKey || ev.metaKey || ev.altKey) return;
    const t = ev.target;
    if (t && (t.tagName === "INPUT" || t.tagName === "SELECT" || t.tagName === "TEXTAREA")) {
      if (t.id === "note" && ev.key === "Enter") {
        ev.preventDefault();
        const box = document.getElementById("labelling");
        if (box && box.dataset.label) setLabel(box.dataset.label);
        else status("choose a label (1, 2 or 3) to save the note with it");
        t.blur();
      } else if (ev.key === "Escape") {
        t.blur();
      }
      return;
    }
    if (ev.key === "j" || ev.key === "ArrowDown") { ev.preventDefault(); go(1); }
    else if (ev.key === "k" || ev.key === "ArrowUp") { ev.preventDefault(); go(-1); }
    else if (ev.key in KEYS) { ev.preventDefault(); setLabel(KEYS[ev.key]); }
    else if (ev.key === "n") {
      const note = document.getElementById("note");
      if (note) { ev.preventDefault(); note.focus(); }
    }
  });

  document.addEventListener("click", async function (ev) {
    const lab = ev.target.closest("button.lab");
    if (lab) { setLabel(lab.dataset.label); return; }
    const cmp = ev.target.closest("button.compare");
    if (cmp) { compare(cmp); return; }
    const act = ev.target.closest("button.activate");
    if (act) {
      const out = act.parentElement.querySelector(".compare-out");
      act.disabled = true;
      try {
        const data = await write("/api/activate", {camera: act.dataset.camera,
          version: act.dataset.version, active: act.dataset.active || ""});
        out.textContent = " " + data.active + " is now active (was " + (data.was || "none") +
          "); reloading…";
        window.location.reload();
      } catch (err) {
        out.textContent = " not switched: " + err.message;
        act.hidden = true;
        act.disabled = false;
      }
    }
  });

  // Switching the active baseline: first the comparison, then a confirming button.
  async function compare(cmp) {
    const cell = cmp.parentElement;
    const out = cell.querySelector(".compare-out");
    const act = cell.querySelector("button.activate");
    out.textContent = " comparing with the active baseline…";
    cmp.disabled = true;
    const q = new URLSearchParams({camera: cmp.dataset.camera, version: cmp.dataset.version});
    try {
      const resp = await fetch("/api/compare?" + q.toString());
      const data = await resp.json();
      out.textContent = " " + (resp.ok ? data.text : data.error);
      if (resp.ok) { act.dataset.active = data.active || ""; act.hidden = false; }
    } catch (err) {
      out.textContent = " the review server did not answer";
    }
    cmp.disabled = false;
  }

  // Filters apply as soon as they change.
  const form = document.getElementById("filters");
  if (form) form.addEventListener("change", function () { form.submit(); });

  const cur = currentRow();
  if (cur) cur.scrollIntoView({block: "nearest"});
})();
