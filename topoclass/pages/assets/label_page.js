// The labelling page: one image at a time, keys 1-9 label it, every label is saved at once.
(function () {
  "use strict";
  const app = document.getElementById("app");
  const config = JSON.parse(app.dataset.config);
  const token = new URLSearchParams(location.search).get("token") || "";
  let state = null, current = 0, overlay = false, suggestions = null, message = "";

  function api(path, body) {
    const sep = path.includes("?") ? "&" : "?";
    const url = path + sep + "token=" + encodeURIComponent(token);
    const options = body === undefined ? {} : {
      method: "POST", headers: {"Content-Type": "application/json"}, body: JSON.stringify(body)};
    return fetch(url, options).then(r => r.json().then(data => {
      if (!r.ok) { throw new Error(data.error || ("request failed: " + r.status)); }
      return data;
    }));
  }
  function url(path) { return path + (path.includes("?") ? "&" : "?") + "token=" + encodeURIComponent(token); }
  function el(tag, attrs, text) {
    const e = document.createElement(tag);
    for (const [k, v] of Object.entries(attrs || {})) { e.setAttribute(k, v); }
    if (text !== undefined) { e.textContent = text; }
    return e;
  }

  app.innerHTML = `
    <header><h1>Labelling micrographs</h1>
      <span id="position"></span>
      <span>features measured <span id="progress"><span></span></span> <span id="measured"></span></span>
      <span class="hint">keys: 1–9 class · ← → previous / next · n next suggested · u undo · o sites overlay</span>
    </header>
    <div id="stage"><img id="picture" alt="micrograph"><svg id="overlay"></svg></div>
    <aside id="side">
      <div id="name" class="path"></div>
      <div id="status"></div>
      <h2>Class</h2><div id="classes"></div>
      <form id="newclass"><input type="text" id="newclassname" placeholder="new class name"></form>
      <h2>Sample / group</h2>
      <input type="text" id="group" placeholder="sample the image was taken from">
      <div class="hint">kept for the next image unless changed</div>
      <h2>Suggested next</h2><div id="suggestion"></div>
      <h2>Model so far</h2><div id="estimate"></div><svg id="curve" width="300" height="110"></svg>
      <h2>Order measures</h2><table id="measures"></table>
      <div class="caution" id="caution"></div>
    </aside>
    <div id="strip"></div>`;
  document.getElementById("caution").textContent = config.caution;
  const groupField = document.getElementById("group");

  function refreshState(data) {
    state = data;
    const done = state.images.filter(i => i.label).length;
    document.getElementById("measured").textContent = state.measured + " / " + state.total;
    document.querySelector("#progress span").style.width = (100 * state.measured / state.total) + "%";
    document.getElementById("position").textContent =
      "image " + (current + 1) + " of " + state.total + " · labelled " + done;
    drawClasses();
    drawStrip();
    drawStatus();
  }

  function drawClasses() {
    const box = document.getElementById("classes");
    box.innerHTML = "";
    const mine = state.images[current].label;
    state.classes.forEach((name, k) => {
      const b = el("button", {type: "button", "data-class": name});
      if (k < 9) { b.appendChild(el("kbd", {}, String(k + 1))); }
      b.appendChild(document.createTextNode(" " + name));
      if (name === mine) { b.classList.add("current"); }
      b.addEventListener("click", () => later(() => assign(name)));
      box.appendChild(b);
    });
  }

  function drawStatus() {
    const item = state.images[current];
    document.getElementById("name").textContent = item.name;
    const status = document.getElementById("status");
    status.className = item.error ? "error" : "";
    status.textContent = item.error ? item.error :
      item.label ? ("labelled " + item.label + (item.group ? " · sample " + item.group : "")) :
      "not labelled yet";
    if (message) { status.textContent += " — " + message; }
  }

  function drawStrip() {
    const strip = document.getElementById("strip");
    strip.innerHTML = "";
    const lo = Math.max(0, current - 6), hi = Math.min(state.total, lo + 14);
    for (let n = lo; n < hi; n++) {
      const item = state.images[n];
      const fig = el("figure", {"data-index": String(n)});
      if (n === current) { fig.classList.add("here"); }
      if (item.label) { fig.classList.add("done"); }
      fig.appendChild(el("img", {src: url("/api/image/" + n + "?size=thumb"), alt: item.name, loading: "lazy"}));
      fig.appendChild(el("figcaption", {}, item.label || "·"));
      fig.addEventListener("click", () => show(n));
      strip.appendChild(fig);
    }
  }

  function show(n) {
    current = Math.max(0, Math.min(state.total - 1, n));
    message = "";
    const item = state.images[current];
    if (item.group) { groupField.value = item.group; }
    document.getElementById("picture").src = url("/api/image/" + current);
    document.getElementById("overlay").innerHTML = "";
    refreshState(state);
    loadMeasures(current);
    if (overlay) { loadSites(current); }
  }

  function loadMeasures(n) {
    api("/api/measures/" + n).then(data => {
      if (n !== current) { return; }
      const table = document.getElementById("measures");
      table.innerHTML = "";
      if (!data.measures) {
        table.appendChild(el("tr", {}, state.images[n].error ? "" : "measuring…"));
        return;
      }
      for (const [k, v] of Object.entries(data.measures)) {
        const tr = el("tr");
        tr.appendChild(el("td", {}, k));
        tr.appendChild(el("td", {class: "n"}, v === null ? "–" : Number(v).toPrecision(3)));
        table.appendChild(tr);
      }
    }).catch(() => {});
  }

  function loadSites(n) {
    api("/api/sites/" + n).then(data => {
      if (n !== current || !overlay) { return; }
      const img = document.getElementById("picture");
      const svg = document.getElementById("overlay");
      const place = () => {
        svg.setAttribute("viewBox", "-0.5 -0.5 " + data.width + " " + data.height);
        svg.style.width = img.clientWidth + "px";
        svg.style.height = img.clientHeight + "px";
        svg.style.left = img.offsetLeft + "px";
        svg.style.top = img.offsetTop + "px";
      };
      const r = 0.21 * data.spacing;
      svg.innerHTML = data.sites.map(([x, y, kind, border]) =>
        `<circle cx="${x}" cy="${y}" r="${r}" fill="${border ? "none" : config.colours[kind]}" ` +
        `stroke="${config.colours[kind]}" stroke-width="${r / 3}" opacity="${border ? 0.6 : 0.85}"/>`).join("");
      if (img.complete) { place(); } else { img.addEventListener("load", place, {once: true}); }
    }).catch(e => { message = e.message; drawStatus(); });
  }

  function nextIndex() {
    if (suggestions && suggestions.ready) {  // before that, the images in their own order
      const open = suggestions.order.find(s => !state.images[s.index].label && s.index !== current);
      if (open) { return open.index; }
    }
    for (let k = 1; k <= state.total; k++) {
      const n = (current + k) % state.total;
      if (!state.images[n].label) { return n; }
    }
    return Math.min(current + 1, state.total - 1);
  }

  // Key presses run one after another, each after the previous one's requests have finished,
  // so a quick "label, then undo" never lands in the wrong order.
  let queue = Promise.resolve();
  function later(action) { queue = queue.then(action).catch(() => {}); }

  function assign(name) {
    const group = groupField.value.trim();
    return api("/api/label", {index: current, label: name, group: group}).then(data => {
      refreshState(data);
      return loadSuggestions();
    }).then(() => show(nextIndex())).catch(e => { message = e.message; drawStatus(); });
  }

  function undo() {
    return api("/api/undo", {}).then(data => {
      refreshState(data);
      if (data.undone !== null && data.undone !== undefined) { show(data.undone); }
      return loadSuggestions();
    }).catch(e => { message = e.message; drawStatus(); });
  }

  function loadSuggestions() {
    return api("/api/suggestions").then(data => {
      suggestions = data;
      const box = document.getElementById("suggestion");
      box.innerHTML = "";
      const top = data.order.find(s => !state.images[s.index].label);
      if (!data.ready) {
        box.textContent = data.message;
      } else if (!top) {
        box.textContent = "nothing left to suggest";
      } else {
        const go = el("a", {href: "#", id: "go-suggested"}, state.images[top.index].name);
        go.addEventListener("click", ev => { ev.preventDefault(); show(top.index); });
        box.appendChild(go);
        if (top.predicted) {
          box.appendChild(el("div", {}, "quick model: " + top.predicted + " (" +
            top.confidence.toFixed(2) + ", an estimate; judge the image yourself)"));
        }
        box.appendChild(el("div", {class: "hint"}, top.reason));
      }
      const est = document.getElementById("estimate");
      est.textContent = data.estimate === null ?
        (data.message || "the estimate needs more labels per class and sample") :
        "grouped cross-validated macro-F1 " + data.estimate.toFixed(2) + " with " + data.labelled + " labels";
      drawCurve(data.curve);
    });
  }

  function drawCurve(points) {
    const svg = document.getElementById("curve");
    const w = 300, h = 110, left = 30, bottom = 18;
    if (!points.length) { svg.innerHTML = ""; return; }
    const nMax = Math.max(points[points.length - 1][0], points[0][0] + 1);
    const nMin = points[0][0];
    const x = n => left + (w - left - 8) * (n - nMin) / Math.max(1, nMax - nMin);
    const y = f => 6 + (h - bottom - 6) * (1 - f);
    const path = points.map(([n, f], k) => (k ? "L" : "M") + x(n).toFixed(1) + " " + y(f).toFixed(1)).join(" ");
    svg.innerHTML =
      `<line x1="${left}" y1="${y(0)}" x2="${w - 4}" y2="${y(0)}" stroke="#999"/>` +
      `<line x1="${left}" y1="${y(0)}" x2="${left}" y2="${y(1)}" stroke="#999"/>` +
      `<text x="2" y="${y(1) + 4}" font-size="10">1.0</text><text x="2" y="${y(0)}" font-size="10">0</text>` +
      `<text x="${left}" y="${h - 2}" font-size="10">${nMin}</text>` +
      `<text x="${w - 30}" y="${h - 2}" font-size="10">${nMax} labels</text>` +
      `<path d="${path}" fill="none" stroke="#0072B2" stroke-width="2"/>` +
      points.map(([n, f]) => `<circle cx="${x(n)}" cy="${y(f)}" r="2.5" fill="#0072B2"><title>${n} labels: ${f.toFixed(2)}</title></circle>`).join("");
  }

  document.getElementById("newclass").addEventListener("submit", ev => {
    ev.preventDefault();
    const field = document.getElementById("newclassname");
    api("/api/classes", {name: field.value}).then(data => { field.value = ""; field.blur(); refreshState(data); })
      .catch(e => { message = e.message; drawStatus(); });
  });
  groupField.addEventListener("keydown", ev => { if (ev.key === "Enter" || ev.key === "Escape") { groupField.blur(); } });

  document.addEventListener("keydown", ev => {
    if (!state || ev.target.tagName === "INPUT" || ev.altKey || ev.metaKey) { return; }
    if (ev.ctrlKey && ev.key !== "z") { return; }
    if (/^[1-9]$/.test(ev.key)) {
      const name = state.classes[Number(ev.key) - 1];
      if (name !== undefined) { later(() => assign(name)); }
    } else if (ev.key === "ArrowRight") { later(() => show(current + 1));
    } else if (ev.key === "ArrowLeft") { later(() => show(current - 1));
    } else if (ev.key === "n") { later(() => show(nextIndex()));
    } else if (ev.key === "u" || (ev.ctrlKey && ev.key === "z")) { later(undo);
    } else if (ev.key === "o") {
      later(() => {
        overlay = !overlay;
        if (overlay) { loadSites(current); } else { document.getElementById("overlay").innerHTML = ""; }
      });
    } else { return; }
    ev.preventDefault();
  });

  // Features arrive in the background: poll the progress until every image is measured.
  function poll() {
    api("/api/state").then(data => {
      const grew = data.measured !== state.measured;
      refreshState(data);
      if (grew) { loadMeasures(current); loadSuggestions().catch(() => {}); }
      if (data.measured < data.total) { setTimeout(poll, 1500); }
    }).catch(() => setTimeout(poll, 5000));
  }

  api("/api/state").then(data => {
    state = data;
    const first = state.images.findIndex(i => !i.label);
    const last = state.images.filter(i => i.group).pop();
    if (last) { groupField.value = last.group; }
    show(first < 0 ? 0 : first);
    document.body.dataset.ready = "yes";
    loadSuggestions().catch(() => {});
    if (state.measured < state.total) { setTimeout(poll, 1000); }
  }).catch(e => { app.textContent = "cannot load the page: " + e.message; });
})();
