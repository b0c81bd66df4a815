// formread review page: works through flagged fields, keyboard first.
// No inline script (the server's Content-Security-Policy forbids it); talks to the local API
// with the session token in the X-Formread-Token header.
"use strict";

(function () {
  const token = document.querySelector('meta[name="formread-token"]').content;
  const $ = (id) => document.getElementById(id);
  const input = $("value");

  const state = {
    ids: [],            // waiting fields for the current filter, oldest first
    current: null,      // the field shown (detail from the server)
    history: [],        // fields decided in this session, last one at the end
    skipped: new Set(), // skipped for now in this session
    showPage: false,
    saved: 0,
    busy: false,
  };

  // ------------------------------------------------------------------ server

  async function api(path, json) {
    const headers = { "X-Formread-Token": token };
    const opts = { method: "GET", headers: headers, cache: "no-store", credentials: "same-origin" };
    if (json !== undefined) {
      opts.method = "POST";
      headers["Content-Type"] = "application/json";
      opts.body = JSON.stringify(json);
    }
    let res;
    try {
      res = await fetch(path, opts);
    } catch (e) {
      return { status: 0, data: { error: "the review server cannot be reached (was it stopped?)" } };
    }
    let data;
    try {
      data = await res.json();
    } catch (e) {
      data = { error: "unexpected answer from the review server" };
    }
    return { status: res.status, data: data };
  }

  const imgUrl = (kind, id) => "/img/" + kind + "/" + id + "?token=" + encodeURIComponent(token);
  const pct = (p) => (p === null || p === undefined) ? "" : Math.round(p * 100) + "%";
  const basename = (s) => (s || "").split(/[\\/]/).pop();

  function say(text, kind) {
    const m = $("msg");
    m.textContent = text || "";
    m.className = "msg" + (kind ? " " + kind : "");
  }

  function shown(value) {
    if (value === null || value === undefined) return "nothing";
    if (value === "") return "blank";
    return value;
  }

  // ------------------------------------------------------------------ queue

  function fillSelect(sel, items, allText, words) {
    const keep = sel.value;
    sel.textContent = "";
    const all = document.createElement("option");
    all.value = "";
    all.textContent = allText;
    sel.appendChild(all);
    for (const [key, n] of items) {
      const o = document.createElement("option");
      o.value = key;
      o.textContent = (words ? words(key) : key) + " (" + n + ")";
      sel.appendChild(o);
    }
    if ([...sel.options].some((o) => o.value === keep)) sel.value = keep;
  }

  function reasonWords(r) {
    if (r === "low_confidence") return "not sure";
    if (r === "rule_failed") return "any rule failed";
    if (r.startsWith("rule_failed:")) return "rule failed: " + r.slice(12);
    if (r === "segmentation_doubtful") return "digits run together";
    if (r === "page_not_registered") return "page not matched";
    if (r === "missing") return "nothing read";
    return r;
  }

  async function loadQueue() {
    const q = new URLSearchParams({ name: $("f-name").value, reason: $("f-reason").value });
    const r = await api("/api/queue?" + q.toString());
    if (r.status !== 200) {
      say(r.data.error || "cannot load the list", "bad");
      return false;
    }
    state.ids = r.data.ids;
    state.saved = r.data.saved;
    $("reviewer").textContent = r.data.reviewer;
    $("export-cmd").textContent = "formread export " + r.data.outdir;
    fillSelect($("f-name"), r.data.filters.names, "all fields", null);
    fillSelect($("f-reason"), r.data.filters.reasons, "all reasons", reasonWords);
    const filtered = $("f-name").value || $("f-reason").value;
    let text = state.ids.length + " left to check";
    if (filtered) text += " (" + r.data.filters.total + " in all)";
    text += " · " + state.saved + " saved";
    $("left").textContent = text;
    return true;
  }

  async function next() {
    if (!(await loadQueue())) return;
    const curId = state.current ? state.current.id : null;
    let pick = state.ids.find((id) => !state.skipped.has(id) && id !== curId);
    if (pick === undefined) pick = state.ids.find((id) => !state.skipped.has(id));
    if (pick === undefined && state.ids.length) {
      state.skipped.clear();
      pick = state.ids.find((id) => id !== curId);
      if (pick === undefined) pick = state.ids[0];
    }
    if (pick === undefined) {
      showDone();
      return;
    }
    await show(pick);
  }

  function showDone() {
    state.current = null;
    $("card").hidden = true;
    $("done").hidden = false;
    const filtered = $("f-name").value || $("f-reason").value;
    $("done-text").textContent = (filtered ? "Nothing left for this choice of field and reason; choose " +
      "\u201call\u201d to see the rest. " : "") + state.saved + " saved in this session. Press B to go back.";
    renderPage();
  }

  async function show(id) {
    const r = await api("/api/field/" + id);
    if (r.status !== 200) {
      say(r.data.error || "cannot load this field", "bad");
      return;
    }
    render(r.data);
  }

  // ------------------------------------------------------------------ drawing

  function render(d) {
    state.current = d;
    $("done").hidden = true;
    $("card").hidden = false;
    $("field-name").textContent = d.name;
    $("field-where").textContent = "page " + d.page_number + " of " + basename(d.source);
    $("field-where").title = d.source;

    const earlier = $("earlier");
    if (d.final_status) {
      const lr = d.last_review;
      earlier.textContent = "Already decided: " + shown(d.final_value) + " (" + d.status_words + ")" +
        (lr ? " by " + lr.reviewer + " at " + lr.at.replace("T", " ").replace("+00:00", " UTC") : "") +
        ". Decide again to change it.";
      earlier.hidden = false;
    } else {
      earlier.hidden = true;
    }

    const img = $("field-img");
    if (d.has_image) {
      img.src = imgUrl("field", d.id);
      img.alt = "Field " + d.name + " as scanned, page " + d.page_number;
      img.hidden = false;
      $("no-img").hidden = true;
    } else {
      img.removeAttribute("src");
      img.hidden = true;
      $("no-img").hidden = false;
    }

    const why = $("why");
    why.textContent = "";
    for (const s of d.why) {
      const li = document.createElement("li");
      li.textContent = s;
      why.appendChild(li);
    }
    const rules = Object.entries(d.rules || {});
    if (rules.length) {
      const li = document.createElement("li");
      li.className = "rules";
      li.textContent = "Rules: " + rules.map(([k, ok]) => k + (ok ? " passed" : " failed")).join(", ") + ".";
      why.appendChild(li);
    }

    const prop = $("proposal");
    prop.textContent = "";
    if (!d.reading) {
      prop.textContent = d.reading === null ? "none" : "blank";
    } else {
      [...d.reading].forEach((ch, i) => {
        const span = document.createElement("span");
        span.textContent = ch;
        const pos = (d.digit_probs || [])[i];
        if (pos && pos[0] && String(pos[0][0]) === ch && pos[0][1] < 0.8) {
          span.className = "weak";
          span.title = "only " + pct(pos[0][1]) + " sure of this digit";
        }
        prop.appendChild(span);
      });
    }
    prop.classList.toggle("none", !d.reading);
    $("sure").textContent = d.confidence === null ? "" :
      pct(d.confidence) + " sure · " + pct(d.threshold) + " needed";

    const alts = $("alts");
    alts.textContent = "";
    for (const [s, p] of (d.alternatives || []).slice(0, 5)) {
      const li = document.createElement("li");
      const v = document.createElement("span");
      v.className = "alt-value";
      v.textContent = s === "" ? "blank" : s;
      const bar = document.createElement("span");
      bar.className = "bar";
      const fill = document.createElement("span");
      fill.style.width = Math.max(2, Math.round(p * 100)) + "%";
      bar.appendChild(fill);
      const n = document.createElement("span");
      n.className = "p";
      n.textContent = pct(p);
      li.append(v, bar, n);
      alts.appendChild(li);
    }
    if (!alts.children.length) {
      const li = document.createElement("li");
      li.className = "none";
      li.textContent = "none";
      alts.appendChild(li);
    }

    renderPositions(d.digit_probs || []);

    input.value = "";
    input.maxLength = d.max_digits;
    input.placeholder = d.reading ? d.reading : "";
    $("hint").textContent = d.reading
      ? "Type the digits you see and press Enter, or press A to keep " + d.reading + "."
      : (d.reading === ""
        ? "Read as blank. Type the digits you see and press Enter, or press A or E if it is blank."
        : "Type the digits you see and press Enter, or mark the field (U, E).");
    input.focus();
    renderPage();
  }

  function renderPositions(probs) {
    const t = $("positions");
    [...t.querySelectorAll("tr")].forEach((tr) => tr.remove());
    $("no-positions").hidden = probs.length > 0;
    if (!probs.length) return;
    const head = document.createElement("tr");
    const corner = document.createElement("th");
    corner.textContent = "";
    head.appendChild(corner);
    probs.forEach((_, i) => {
      const th = document.createElement("th");
      th.scope = "col";
      th.textContent = String(i + 1);
      head.appendChild(th);
    });
    t.appendChild(head);
    const ranks = Math.max(...probs.map((p) => p.length));
    for (let k = 0; k < Math.min(ranks, 3); k++) {
      const tr = document.createElement("tr");
      const th = document.createElement("th");
      th.scope = "row";
      th.textContent = k === 0 ? "best" : (k === 1 ? "2nd" : "3rd");
      tr.appendChild(th);
      for (const pos of probs) {
        const td = document.createElement("td");
        if (pos[k]) {
          const dgt = document.createElement("b");
          dgt.textContent = String(pos[k][0]);
          const p = document.createElement("small");
          p.textContent = pct(pos[k][1]);
          td.append(dgt, p);
          if (k === 0 && pos[k][1] < 0.8) td.className = "weak";
        }
        tr.appendChild(td);
      }
      t.appendChild(tr);
    }
  }

  async function renderPage() {
    const pv = $("pageview");
    const d0 = state.current;
    // a field without its own picture (page not matched to the layout) is read from the whole page
    const auto = d0 && !d0.has_image && d0.has_page_image;
    pv.hidden = !d0 || !(state.showPage || auto);
    $("main").classList.toggle("with-page", !pv.hidden);
    if (pv.hidden) return;
    const d = state.current;
    const r = await api("/api/page/" + d.page_id);
    if (r.status !== 200) {
      say(r.data.error || "cannot load the page", "bad");
      return;
    }
    const page = r.data;
    $("page-where").textContent = "page " + page.page_number + " of " + basename(page.source);
    const frame = $("page-frame");
    frame.querySelectorAll(".box").forEach((b) => b.remove());
    const img = $("page-img");
    $("no-page").hidden = page.has_image;
    img.hidden = !page.has_image;
    if (!page.has_image) return;
    const place = () => {
      const W = img.naturalWidth, H = img.naturalHeight;
      if (!W || !H) return;
      frame.querySelectorAll(".box").forEach((b) => b.remove());
      for (const f of page.fields) {
        if (!f.box_px) continue;
        const [x0, y0, x1, y1] = f.box_px;
        const b = document.createElement("div");
        b.className = "box" + (f.id === d.id ? " here" : "") + (f.final_status ? " decided" : "");
        b.style.left = (100 * x0 / W) + "%";
        b.style.top = (100 * y0 / H) + "%";
        b.style.width = (100 * (x1 - x0) / W) + "%";
        b.style.height = (100 * (y1 - y0) / H) + "%";
        const label = document.createElement("span");
        label.textContent = f.name;
        b.appendChild(label);
        frame.appendChild(b);
      }
    };
    img.alt = "Whole page " + page.page_number + " of " + basename(page.source) + ", this field outlined";
    const url = imgUrl("page", page.id);
    if (img.getAttribute("src") !== url) {
      img.onload = place;
      img.src = url;
    } else {
      place();
    }
  }

  // ------------------------------------------------------------------ actions

  async function save(action, value) {
    const d = state.current;
    if (!d || state.busy) return;
    state.busy = true;
    try {
      const r = await api("/api/field/" + d.id, { action: action, value: value, version: d.version });
      if (r.status === 200) {
        const f = r.data.field;
        if (state.history[state.history.length - 1] !== f.id) state.history.push(f.id);
        state.skipped.delete(f.id);
        await next();
        const warn = (r.data.warnings || []).join(" ");
        say("Saved " + f.name + " (page " + f.page_number + " of " + basename(f.source) + "): " +
            shown(f.final_value) + ", " +
            f.status_words + "." + (warn ? " Note: " + warn + " Press B to look again." : ""), warn ? "warn" : "ok");
      } else if (r.status === 409 && r.data.field) {
        render(r.data.field);
        say("Another reviewer saved this field after it was shown to you. It now holds " +
            shown(r.data.field.final_value) + " (" + r.data.field.status_words +
            "). Look again and decide, or press S to skip.", "bad");
      } else {
        say(r.data.error || ("refused (" + r.status + ")"), "bad");
        input.select();
      }
    } finally {
      state.busy = false;
    }
  }

  async function back() {
    if (!state.history.length) {
      say("Nothing to go back to yet.", "bad");
      return;
    }
    const id = state.history.pop();
    await show(id);
    say("Back to an earlier field.", "ok");
  }

  async function skip() {
    if (!state.current) return;
    state.skipped.add(state.current.id);
    await next();
    say("Skipped; it stays on the list.", "ok");
  }

  function togglePage() {
    state.showPage = !state.showPage;
    renderPage();
  }

  function act(name) {
    if (name === "keep") return save("confirm", null);
    if (name === "unreadable") return save("unreadable", null);
    if (name === "empty") return save("empty", null);
    if (name === "back") return back();
    if (name === "skip") return skip();
    if (name === "page") return togglePage();
  }

  const KEYS = { a: "keep", u: "unreadable", e: "empty", b: "back", s: "skip", p: "page" };

  document.addEventListener("keydown", (ev) => {
    if (ev.target.tagName === "SELECT" || ev.ctrlKey || ev.metaKey || ev.altKey) return;
    if (ev.key === "Enter") {
      ev.preventDefault();
      if (!state.current) return;
      const v = input.value.trim();
      if (v === "") {
        say(state.current.reading ? "Type the digits first, or press A to keep the proposal."
                                  : "Type the digits first, or mark the field (U, E).", "bad");
        return;
      }
      save("correct", v);
      return;
    }
    if (ev.key === "Escape") {
      ev.preventDefault();
      if (state.showPage) togglePage(); else input.value = "";
      return;
    }
    if (ev.key.length !== 1) return;
    if (/[0-9]/.test(ev.key)) {
      if (ev.target !== input && state.current) input.focus();
      return;
    }
    ev.preventDefault();
    const name = KEYS[ev.key.toLowerCase()];
    if (name) act(name);
    else say("Digits only. The keys are listed at the bottom of the page.", "bad");
  });

  input.addEventListener("input", () => {
    const clean = input.value.replace(/[^0-9]/g, "");
    if (clean !== input.value) input.value = clean;
  });

  input.addEventListener("blur", () => {
    setTimeout(() => {
      const a = document.activeElement;
      if (!a || a === document.body) input.focus();
    }, 0);
  });

  for (const sel of [$("f-name"), $("f-reason")]) {
    sel.addEventListener("change", async () => {
      state.skipped.clear();
      state.current = null;
      await next();
      input.focus();
    });
  }

  for (const btn of document.querySelectorAll("button[data-act]")) {
    btn.addEventListener("click", () => {
      act(btn.dataset.act);
      input.focus();
    });
  }

  $("entry").addEventListener("submit", (ev) => ev.preventDefault());

  next();
})();
