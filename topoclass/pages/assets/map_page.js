// The map page: zoom (buttons, wheel), pan (drag) and per-tile details (click), offline.
(function () {
  "use strict";
  var svg = document.getElementById("map");
  if (!svg) { return; }
  var W = Number(svg.dataset.width), H = Number(svg.dataset.height);
  var tiles = JSON.parse(document.getElementById("tile-data").textContent);
  var detail = document.getElementById("tile-detail");
  var level = document.getElementById("zoom-level");
  var view = {x: 0, y: 0, w: W, h: H};

  function show() {
    svg.setAttribute("viewBox", [view.x, view.y, view.w, view.h].join(" "));
    level.textContent = "zoom " + (W / view.w).toFixed(1) + "×";
  }
  function zoom(factor, cx, cy) {
    // factor > 1 zooms in around (cx, cy), in image pixels; never out past the whole image.
    var w = Math.min(W, Math.max(W / 200, view.w / factor));
    var h = w * H / W;
    cx = cx === undefined ? view.x + view.w / 2 : cx;
    cy = cy === undefined ? view.y + view.h / 2 : cy;
    view.x = Math.min(Math.max(0, cx - (cx - view.x) * w / view.w), W - w);
    view.y = Math.min(Math.max(0, cy - (cy - view.y) * h / view.h), H - h);
    view.w = w; view.h = h;
    show();
  }
  function toImage(evt) {
    var box = svg.getBoundingClientRect();
    return {x: view.x + (evt.clientX - box.left) / box.width * view.w,
            y: view.y + (evt.clientY - box.top) / box.height * view.h};
  }
  document.getElementById("zoom-in").addEventListener("click", function () { zoom(2); });
  document.getElementById("zoom-out").addEventListener("click", function () { zoom(0.5); });
  document.getElementById("zoom-fit").addEventListener("click", function () {
    view = {x: 0, y: 0, w: W, h: H}; show();
  });
  svg.addEventListener("wheel", function (evt) {
    evt.preventDefault();
    var p = toImage(evt);
    zoom(evt.deltaY < 0 ? 1.25 : 0.8, p.x, p.y);
  }, {passive: false});

  var drag = null, moved = false;
  svg.addEventListener("pointerdown", function (evt) {
    drag = {x: evt.clientX, y: evt.clientY, vx: view.x, vy: view.y}; moved = false;
  });
  window.addEventListener("pointermove", function (evt) {
    if (!drag) { return; }
    var box = svg.getBoundingClientRect();
    var dx = (evt.clientX - drag.x) / box.width * view.w;
    var dy = (evt.clientY - drag.y) / box.height * view.h;
    if (Math.abs(evt.clientX - drag.x) + Math.abs(evt.clientY - drag.y) > 3) {
      moved = true; svg.classList.add("dragging");
    }
    view.x = Math.min(Math.max(0, drag.vx - dx), W - view.w);
    view.y = Math.min(Math.max(0, drag.vy - dy), H - view.h);
    show();
  });
  window.addEventListener("pointerup", function () { drag = null; svg.classList.remove("dragging"); });

  function cell(text) {
    var td = document.createElement("td"); td.textContent = text; return td;
  }
  function describe(i) {
    var t = tiles[i];
    detail.textContent = "";
    var h = document.createElement("h2");
    h.textContent = "tile " + t.x0 + "," + t.y0 + " – " + t.x1 + "," + t.y1;
    detail.appendChild(h);
    var table = document.createElement("table");
    Object.keys(t).forEach(function (key) {
      if (t[key] === "" || t[key] === null) { return; }
      var tr = document.createElement("tr");
      tr.appendChild(cell(key)); tr.appendChild(cell(String(t[key])));
      table.appendChild(tr);
    });
    detail.appendChild(table);
    var note = document.createElement("p");
    note.className = "note";
    note.textContent = "Probabilities are estimates from the labelled training set.";
    detail.appendChild(note);
  }
  svg.addEventListener("click", function (evt) {
    if (moved) { return; }
    var rect = evt.target.closest("rect.tile");
    if (!rect) { return; }
    var old = svg.querySelector("rect.tile.chosen");
    if (old) { old.classList.remove("chosen"); }
    rect.classList.add("chosen");
    describe(Number(rect.dataset.i));
  });
  show();
}());
