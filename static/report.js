// Report page: delete (asks first); and the reading editor - take another reading, mark the dish
// as an ellipse and the areas to leave out as boxes or brush strokes on the photo, preview a
// threshold over the photo, then measure again in place (POST .../reanalyze) and swap in the
// updated report.
(function () {
  "use strict";
  const SVG = "http://www.w3.org/2000/svg";
  const HANDLE_SCREEN_PX = 11;
  const MIN_BOX_PX = 3;
  // The server's bounds on painted strokes (service/web/readings.py).
  const MAX_STROKES = 64, MAX_STROKE_POINTS = 1000, MAX_BRUSH_PX = 500;
  let dropWindowListeners = null;

  function initDelete() {
    const button = document.getElementById("delete-button");
    if (!button) return;
    button.addEventListener("click", async () => {
      if (!confirm("Delete this specimen, its pictures and its measurements?")) return;
      const answer = await fetch("/api/specimens/" + encodeURIComponent(button.dataset.id), { method: "DELETE" });
      if (answer.status === 204) window.location.assign("/specimens");
      else alert("Not deleted: the server answered " + answer.status);
    });
  }

  function ellipseFrom(roi) {
    if (!roi) return null;
    if (roi.length === 3) return { cx: roi[0], cy: roi[1], rx: roi[2], ry: roi[2], angle: 0 };
    return { cx: roi[0], cy: roi[1], rx: roi[2], ry: roi[3], angle: roi[4] };
  }

  function initReading() {
    const dataBlock = document.getElementById("reading-data");
    const svg = document.getElementById("stage-marks");
    const form = document.getElementById("reading-form");
    if (!dataBlock || !svg || !form) return;
    const data = JSON.parse(dataBlock.textContent);
    const W = data.width_px, H = data.height_px;
    const asked = data.requested || {};
    const status = document.getElementById("reading-status");
    const slider = document.getElementById("threshold");
    const manual = document.getElementById("threshold-manual");
    const shownValue = document.getElementById("threshold-value");
    const canvas = document.getElementById("threshold-preview");
    const note = document.getElementById("preview-note");
    const regionState = document.getElementById("region-state");
    const field = data.field ? { cx: data.field.cx, cy: data.field.cy, rx: data.field.rx, ry: data.field.ry,
                                 angle: data.field.angle_deg } : null;
    const fallback = { cx: W / 2, cy: H / 2, rx: 0.45 * Math.min(W, H), ry: 0.45 * Math.min(W, H), angle: 0 };
    const state = {
      roiSet: Boolean(asked.roi),
      ellipse: ellipseFrom(asked.roi) || (field ? { ...field } : { ...fallback }),
      exclude: (asked.exclude || []).map((b) => b.slice()),
      // Brush strokes in photo px: {points: [[x, y], ...], radius: r}.
      paint: (asked.paint || []).map((s) => ({ points: s.points.map((p) => p.slice()), radius: s.radius_px })),
      draft: null,
    };
    const brush = document.getElementById("brush-radius");
    const brushShown = document.getElementById("brush-radius-value");
    const undoStroke = document.getElementById("paint-undo");
    brush.max = String(Math.min(MAX_BRUSH_PX, Math.max(8, Math.round(0.15 * Math.min(W, H)))));
    brush.value = String(Math.max(2, Math.round(0.02 * Math.min(W, H))));
    let levels = null; // {width, height, values: Uint8ClampedArray}
    let drag = null;
    let busy = false;

    form.elements.polarity.value = asked.polarity || "auto";
    form.elements.mode.value = asked.mode || "auto";
    const usedThreshold = typeof data.used.threshold === "number" ? data.used.threshold : 0.5;
    slider.value = String(typeof asked.threshold === "number" ? asked.threshold : usedThreshold);
    manual.checked = typeof asked.threshold === "number";

    function say(text, isError) {
      status.textContent = text;
      status.classList.toggle("error", Boolean(isError));
    }

    // ---- marks on the photo (SVG in image pixels) ----
    function pxPerScreenPx() {
      const rect = svg.getBoundingClientRect();
      return rect.width > 0 ? W / rect.width : 1;
    }

    function node(name, attrs, parent) {
      const el = document.createElementNS(SVG, name);
      for (const [k, v] of Object.entries(attrs)) el.setAttribute(k, String(v));
      (parent || svg).append(el);
      return el;
    }

    function handlePoints(e) {
      const a = (e.angle * Math.PI) / 180, c = Math.cos(a), s = Math.sin(a);
      return { rx: [e.cx + e.rx * c, e.cy + e.rx * s], ry: [e.cx - e.ry * s, e.cy + e.ry * c] };
    }

    function draw() {
      svg.replaceChildren();
      const e = state.ellipse, r = HANDLE_SCREEN_PX * pxPerScreenPx();
      const region = node("g", { class: state.roiSet ? "roi set" : "roi" });
      node("ellipse", { cx: e.cx, cy: e.cy, rx: e.rx, ry: e.ry, transform: `rotate(${e.angle} ${e.cx} ${e.cy})`,
                        "data-handle": "move", "vector-effect": "non-scaling-stroke" }, region);
      const points = handlePoints(e);
      for (const [name, [x, y]] of Object.entries(points)) {
        node("circle", { cx: x, cy: y, r, class: "handle", "data-handle": name }, region);
      }
      node("circle", { cx: e.cx, cy: e.cy, r: r * 0.8, class: "handle centre", "data-handle": "move" }, region);
      state.exclude.forEach((b, i) => {
        const rect = node("rect", { x: b[0], y: b[1], width: b[2] - b[0], height: b[3] - b[1], class: "exclude",
                                    "data-box": i, "vector-effect": "non-scaling-stroke" });
        node("title", {}, rect).textContent = "left out; with the box tool, click to keep it again";
      });
      state.paint.forEach((s) => {
        const d = s.points.map(([x, y], k) => `${k ? "L" : "M"}${x.toFixed(1)} ${y.toFixed(1)}`).join(" ")
          + (s.points.length === 1 ? " l0.01 0" : "");
        node("path", { d, class: "paint", "stroke-width": 2 * s.radius });
      });
      if (state.draft) {
        const [x0, y0, x1, y1] = state.draft;
        node("rect", { x: Math.min(x0, x1), y: Math.min(y0, y1), width: Math.abs(x1 - x0), height: Math.abs(y1 - y0),
                       class: "exclude draft", "vector-effect": "non-scaling-stroke" });
      }
      const shape = Math.abs(e.rx - e.ry) < 0.5 ? `circle of radius ${e.rx.toFixed(0)} px`
        : `ellipse ${(2 * e.rx).toFixed(0)} × ${(2 * e.ry).toFixed(0)} px, turned ${e.angle.toFixed(0)}°`;
      regionState.textContent = (state.roiSet ? "Dish set by hand: " : (field ? "Dish as found: " : "No dish found; drag to set one: "))
        + `${shape} at (${e.cx.toFixed(0)}, ${e.cy.toFixed(0)}).`
        + (state.exclude.length ? ` ${state.exclude.length} area${state.exclude.length > 1 ? "s" : ""} left out.` : "")
        + (state.paint.length ? ` ${state.paint.length} brush stroke${state.paint.length > 1 ? "s" : ""} painted out.` : "");
      svg.classList.toggle("boxing", tool() === "exclude" || tool() === "paint");
      brushShown.textContent = `${brush.value} px`;
      undoStroke.disabled = busy || !state.paint.length;
      for (const input of numberInputs) {
        if (document.activeElement !== input) input.value = String(Math.round(e[input.dataset.roi]));
      }
    }

    // The same ellipse as numbers, for the keyboard and for exact values.
    const numberInputs = Array.from(form.querySelectorAll("input[data-roi]"));
    for (const input of numberInputs) {
      input.addEventListener("input", () => {
        const value = Number(input.value);
        if (input.value === "" || !Number.isFinite(value)) return;
        if ((input.dataset.roi === "rx" || input.dataset.roi === "ry") && value < 1) return;
        state.ellipse[input.dataset.roi] = value;
        state.roiSet = true;
        changed();
      });
    }

    function tool() { return form.elements.tool.value; }

    function imagePoint(event) {
      const rect = svg.getBoundingClientRect();
      return [((event.clientX - rect.left) * W) / rect.width, ((event.clientY - rect.top) * H) / rect.height];
    }

    svg.addEventListener("pointerdown", (event) => {
      if (busy) return;
      const target = event.target;
      const [x, y] = imagePoint(event);
      if (tool() === "paint") {
        if (state.paint.length >= MAX_STROKES) {
          say(`At most ${MAX_STROKES} brush strokes: take one back or clear them first.`, true);
          return;
        }
        drag = { kind: "paint" };
        state.paint.push({ points: [[x, y]], radius: Number(brush.value) });
      } else if (tool() === "exclude") {
        if (target.dataset && target.dataset.box !== undefined) {
          state.exclude.splice(Number(target.dataset.box), 1);
          changed();
          return;
        }
        drag = { kind: "box" };
        state.draft = [x, y, x, y];
      } else if (target.dataset && target.dataset.handle) {
        drag = { kind: target.dataset.handle, from: [x, y], start: { ...state.ellipse } };
      } else {
        return; // let the page scroll
      }
      event.preventDefault();
      svg.setPointerCapture(event.pointerId);
    });

    svg.addEventListener("pointermove", (event) => {
      if (!drag) return;
      const [x, y] = imagePoint(event);
      const e = state.ellipse;
      if (drag.kind === "box") {
        state.draft[2] = x; state.draft[3] = y;
      } else if (drag.kind === "paint") {
        // A point every quarter brush radius (at least one photo pixel) is enough for a smooth path.
        const stroke = state.paint[state.paint.length - 1], last = stroke.points[stroke.points.length - 1];
        if (stroke.points.length >= MAX_STROKE_POINTS) return;
        if (Math.hypot(x - last[0], y - last[1]) < Math.max(1, stroke.radius / 4)) return;
        stroke.points.push([x, y]);
      } else if (drag.kind === "move") {
        e.cx = drag.start.cx + x - drag.from[0];
        e.cy = drag.start.cy + y - drag.from[1];
        state.roiSet = true;
      } else if (drag.kind === "rx") {
        // The long handle resizes and turns: its distance is the half-axis, its direction the angle.
        e.rx = Math.max(4, Math.hypot(x - e.cx, y - e.cy));
        e.angle = (Math.atan2(y - e.cy, x - e.cx) * 180) / Math.PI;
        state.roiSet = true;
      } else if (drag.kind === "ry") {
        const a = (e.angle * Math.PI) / 180;
        e.ry = Math.max(4, Math.abs(-(x - e.cx) * Math.sin(a) + (y - e.cy) * Math.cos(a)));
        state.roiSet = true;
      }
      draw();
      schedulePreview();
    });

    function endDrag() {
      if (!drag) return;
      if (drag.kind === "box" && state.draft) {
        const [x0, y0, x1, y1] = state.draft;
        const box = [Math.max(0, Math.floor(Math.min(x0, x1))), Math.max(0, Math.floor(Math.min(y0, y1))),
                     Math.min(W, Math.ceil(Math.max(x0, x1))), Math.min(H, Math.ceil(Math.max(y0, y1)))];
        if (box[2] - box[0] >= MIN_BOX_PX && box[3] - box[1] >= MIN_BOX_PX) state.exclude.push(box);
        state.draft = null;
      }
      drag = null;
      changed();
    }
    svg.addEventListener("pointerup", endDrag);
    svg.addEventListener("pointercancel", endDrag);

    function changed() { draw(); schedulePreview(); say("Not measured yet: press “Measure again” to use these settings."); }

    // ---- live threshold preview from levels.png ----
    let previewQueued = false;
    function schedulePreview() {
      if (previewQueued) return;
      previewQueued = true;
      requestAnimationFrame(() => { previewQueued = false; preview(); });
    }

    // Pixels the threshold takes lie below it on the levels picture ("below") or above it; a
    // polarity chosen against the one used turns the comparison round.
    function takesBelow() {
      const below = data.used.levels_compare ? data.used.levels_compare === "below" : data.used.polarity !== "bright";
      const chosen = form.elements.polarity.value;
      const flipped = chosen !== "auto" && data.used.polarity && chosen !== data.used.polarity;
      return flipped ? !below : below;
    }

    // The strokes drawn at the levels picture's size: 1 where a brush covered the pixel.
    function paintedAt(lw, lh, sx, sy) {
      if (!state.paint.length) return null;
      const scratch = document.createElement("canvas");
      scratch.width = lw; scratch.height = lh;
      const ctx = scratch.getContext("2d", { willReadFrequently: true });
      ctx.lineCap = "round"; ctx.lineJoin = "round"; ctx.strokeStyle = "#000"; ctx.fillStyle = "#000";
      for (const s of state.paint) {
        const r = s.radius / Math.sqrt(sx * sy);
        if (s.points.length === 1) {
          ctx.beginPath(); ctx.arc(s.points[0][0] / sx, s.points[0][1] / sy, r, 0, 2 * Math.PI); ctx.fill();
          continue;
        }
        ctx.lineWidth = 2 * r;
        ctx.beginPath();
        s.points.forEach(([x, y], k) => (k ? ctx.lineTo(x / sx, y / sy) : ctx.moveTo(x / sx, y / sy)));
        ctx.stroke();
      }
      const alpha = ctx.getImageData(0, 0, lw, lh).data, out = new Uint8Array(lw * lh);
      for (let k = 0; k < out.length; k++) out[k] = alpha[4 * k + 3] >= 128 ? 1 : 0;
      return out;
    }

    function preview() {
      shownValue.textContent = Number(slider.value).toFixed(3);
      const ctx = canvas.getContext("2d");
      if (!levels || !manual.checked) {
        ctx.clearRect(0, 0, canvas.width, canvas.height);
        canvas.dataset.tinted = "0";
        return;
      }
      const { width: lw, height: lh, values } = levels;
      const out = ctx.createImageData(lw, lh);
      const t = Number(slider.value) * 255, dark = takesBelow();
      const region = state.roiSet ? state.ellipse : field;
      const sx = W / lw, sy = H / lh;
      let ca = 1, sa = 0;
      if (region) { const a = (region.angle * Math.PI) / 180; ca = Math.cos(a); sa = Math.sin(a); }
      const boxes = state.exclude.map((b) => [b[0] / sx, b[1] / sy, b[2] / sx, b[3] / sy]);
      const painted = paintedAt(lw, lh, sx, sy);
      let inside = 0, taken = 0;
      for (let i = 0; i < lh; i++) {
        const y = (i + 0.5) * sy;
        for (let j = 0; j < lw; j++) {
          if (region) {
            const dx = (j + 0.5) * sx - region.cx, dy = y - region.cy;
            const u = (dx * ca + dy * sa) / region.rx, v = (-dx * sa + dy * ca) / region.ry;
            if (u * u + v * v > 1) continue;
          }
          let left = false;
          for (const b of boxes) if (j >= b[0] && j < b[2] && i >= b[1] && i < b[3]) { left = true; break; }
          if (left || (painted && painted[i * lw + j])) continue;
          inside += 1;
          const k = i * lw + j, level = values[k];
          if (dark ? level < t : level > t) {
            taken += 1;
            out.data[4 * k] = 230; out.data[4 * k + 1] = 0; out.data[4 * k + 2] = 120; out.data[4 * k + 3] = 150;
          }
        }
      }
      ctx.putImageData(out, 0, 0);
      canvas.dataset.tinted = String(taken);
      const share = inside ? (100 * taken) / inside : 0;
      note.textContent = `At ${Number(slider.value).toFixed(3)} this threshold takes ${share.toFixed(1)}% of the `
        + `${region ? "dish" : "picture"} for the specimen (tinted). Nothing is measured until you press “Measure again”.`;
    }

    if (data.levels_url) {
      const picture = new Image();
      picture.addEventListener("load", () => {
        const scratch = document.createElement("canvas");
        scratch.width = picture.naturalWidth; scratch.height = picture.naturalHeight;
        const ctx = scratch.getContext("2d", { willReadFrequently: true });
        ctx.drawImage(picture, 0, 0);
        const rgba = ctx.getImageData(0, 0, scratch.width, scratch.height).data;
        const values = new Uint8ClampedArray(scratch.width * scratch.height);
        for (let k = 0; k < values.length; k++) values[k] = rgba[4 * k];
        levels = { width: scratch.width, height: scratch.height, values };
        canvas.width = scratch.width; canvas.height = scratch.height;
        canvas.dataset.ready = "1";
        preview();
      });
      picture.src = data.levels_url;
    }

    slider.addEventListener("input", () => { manual.checked = true; schedulePreview(); });
    manual.addEventListener("change", schedulePreview);
    form.addEventListener("change", (event) => {
      if (event.target.name === "tool") draw();
      if (event.target.name === "polarity") schedulePreview();
    });
    document.getElementById("region-clear").addEventListener("click", () => {
      state.roiSet = false;
      state.ellipse = field ? { ...field } : { ...fallback };
      changed();
    });
    undoStroke.addEventListener("click", () => { state.paint.pop(); changed(); });
    brush.addEventListener("input", draw);
    document.getElementById("exclude-clear").addEventListener("click", () => {
      state.exclude = []; state.paint = []; changed();
    });
    document.getElementById("reading-reset").addEventListener("click", () => {
      measure({ mode: null, polarity: null, threshold: null, roi: null, exclude: null, paint: null },
              "every setting automatic");
    });
    // One resize listener per editor: the one of a report swapped out is dropped.
    if (dropWindowListeners) dropWindowListeners.abort();
    dropWindowListeners = new AbortController();
    window.addEventListener("resize", draw, { signal: dropWindowListeners.signal });

    form.addEventListener("submit", (event) => {
      event.preventDefault();
      const e = state.ellipse;
      const round = (v) => Math.round(v * 10) / 10;
      const body = {
        mode: form.elements.mode.value,
        polarity: form.elements.polarity.value,
        threshold: manual.checked ? Number(slider.value) : null,
        roi: state.roiSet ? { cx: round(e.cx), cy: round(e.cy), rx: round(e.rx), ry: round(e.ry),
                              angle_deg: round(((e.angle % 360) + 540) % 360 - 180) } : null,
        exclude: state.exclude.map(([x0, y0, x1, y1]) => ({ x0, y0, x1, y1 })),
        paint: state.paint.map((s) => ({ points: s.points.map(([x, y]) => [round(x), round(y)]), radius_px: s.radius })),
      };
      measure(body, "the settings above");
    });

    for (const button of document.querySelectorAll("button.alternative")) {
      button.addEventListener("click", () => {
        const label = button.querySelector(".alt-label");
        measure({ reading: Number(button.dataset.reading) }, label ? label.textContent : "another reading");
      });
    }

    async function measure(body, what) {
      if (busy) return;
      busy = true;
      for (const b of document.querySelectorAll("#reading button")) b.disabled = true;
      say("Measuring again with " + what + "…");
      try {
        const answer = await fetch("/api/specimens/" + encodeURIComponent(data.id) + "/reanalyze", {
          method: "POST", headers: { "Content-Type": "application/json" }, body: JSON.stringify(body),
        });
        const reply = await answer.json().catch(() => ({}));
        if (!answer.ok) throw new Error(typeof reply.detail === "string" ? reply.detail : "the server answered " + answer.status);
        const n = reply.history ? reply.history.length : null;
        await refreshReport();
        const fresh = document.getElementById("reading-status");
        if (fresh) {
          fresh.textContent = "Measured again" + (n ? ` (reading ${n})` : "") + ": the report shows the new reading.";
        }
      } catch (err) {
        say("Not measured again: " + err.message, true);
        for (const b of document.querySelectorAll("#reading button")) b.disabled = false;
      } finally {
        busy = false;
      }
    }

    draw();
    preview();
  }

  async function refreshReport() {
    // The page itself is rendered by the server; take its new main part and start again on it.
    const answer = await fetch(window.location.pathname, { headers: { Accept: "text/html" } });
    if (!answer.ok) throw new Error("the new report could not be loaded (" + answer.status + ")");
    const fresh = new DOMParser().parseFromString(await answer.text(), "text/html");
    const y = window.scrollY;
    document.querySelector("main").replaceChildren(...fresh.querySelector("main").childNodes);
    document.title = fresh.title;
    window.scrollTo(0, y);
    init();
  }

  function init() {
    initDelete();
    initReading();
  }

  init();
})();
