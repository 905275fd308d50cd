// Upload page: drop or pick images, send each with XHR (upload progress), then wait while it is
// analysed, then link to its report (or open it when a single image was sent).
(function () {
  "use strict";
  const form = document.getElementById("upload-form");
  const zone = document.getElementById("dropzone");
  const picker = document.getElementById("files");
  const queue = document.getElementById("queue");
  const demo = document.getElementById("demo-button");
  const CONCURRENT = 2;
  const UNCERTAIN_BELOW = 0.5; // service.web.formatting.UNCERTAIN_BELOW
  let waiting = [];
  let running = 0;
  let batchSize = 0;

  function text(el, s) { el.textContent = s; }

  function fieldsFor(file, overrides) {
    const data = new FormData();
    data.append("image", file, file.name);
    for (const name of ["label", "kind", "pixel_size_mm", "conditions", "mode", "polarity", "threshold"]) {
      const value = overrides && name in overrides ? overrides[name] : form.elements[name].value.trim();
      if (value !== "") data.append(name, value);
    }
    return data;
  }

  function row(file) {
    const li = document.createElement("li");
    li.className = "waiting";
    const name = document.createElement("span");
    text(name, file.name);
    const bar = document.createElement("progress");
    bar.max = 100; bar.value = 0;
    const state = document.createElement("span");
    state.className = "state";
    text(state, "waiting");
    li.append(name, bar, state);
    queue.append(li);
    return { li, bar, state };
  }

  function send(item) {
    running += 1;
    const { file, view, overrides } = item;
    const xhr = new XMLHttpRequest();
    xhr.open("POST", "/api/specimens");
    xhr.responseType = "json";
    view.li.className = "uploading";
    xhr.upload.onprogress = (e) => {
      if (!e.lengthComputable) return;
      const pct = Math.round((100 * e.loaded) / e.total);
      view.bar.value = pct;
      text(view.state, "uploading " + pct + "%");
    };
    xhr.upload.onload = () => {
      view.bar.removeAttribute("value"); // indeterminate while the server works
      view.li.className = "analysing";
      text(view.state, "analysing…");
    };
    xhr.onload = () => {
      const body = xhr.response || {};
      if (xhr.status === 201) {
        // A reading the segmentation itself doubts is not "done": the outline needs a person's look.
        // So is a specimen outside every reference, or one the matcher gives no confident verdict.
        const confidence = body.segmentation ? body.segmentation.confidence : null;
        const unsure = typeof confidence === "number" && confidence < UNCERTAIN_BELOW;
        const verdict = body.explanation && body.explanation.verdict ? body.explanation.verdict : null;
        const outside = body.in_library === false;
        const undecided = !outside && verdict !== null && verdict.confident === false;
        const reasons = [];
        if (unsure) reasons.push("unsure reading, confidence " + confidence.toFixed(2));
        if (outside) reasons.push("outside every reference");
        if (undecided) reasons.push("no confident verdict");
        const doubtful = reasons.length > 0;
        view.li.className = doubtful ? "needs-look" : "done";
        view.bar.value = 100;
        view.state.replaceChildren();
        const link = document.createElement("a");
        link.href = body.report_url;
        link.className = "report-link";
        const d = body.features && body.features.box_dimension ? body.features.box_dimension.value : null;
        text(link, (unsure ? "check the outline" : "report") + (typeof d === "number" ? " · D = " + d.toFixed(3) : ""));
        view.state.append(doubtful ? "needs a look (" + reasons.join("; ") + "): " : "measured: ", link);
        if (batchSize === 1) window.location.assign(body.report_url);
      } else {
        fail(view, body.detail || ("the server answered " + xhr.status));
      }
      finish();
    };
    xhr.onerror = () => { fail(view, "the connection failed"); finish(); };
    xhr.send(fieldsFor(file, overrides));
  }

  function fail(view, detail) {
    view.li.className = "failed";
    view.bar.value = 0;
    text(view.state, "not measured: " + (typeof detail === "string" ? detail : JSON.stringify(detail)));
  }

  function finish() { running -= 1; pump(); }

  function pump() {
    while (running < CONCURRENT && waiting.length) send(waiting.shift());
  }

  function add(files, overrides) {
    const list = Array.from(files);
    batchSize = list.length + waiting.length + running;
    for (const file of list) waiting.push({ file, overrides, view: row(file) });
    pump();
  }

  picker.addEventListener("change", () => { add(picker.files); picker.value = ""; });
  zone.addEventListener("click", (e) => { if (e.target === zone) picker.click(); });
  zone.addEventListener("keydown", (e) => { if (e.key === "Enter" || e.key === " ") picker.click(); });
  ["dragenter", "dragover"].forEach((t) => zone.addEventListener(t, (e) => { e.preventDefault(); zone.classList.add("over"); }));
  ["dragleave", "drop"].forEach((t) => zone.addEventListener(t, (e) => { e.preventDefault(); zone.classList.remove("over"); }));
  zone.addEventListener("drop", (e) => { if (e.dataTransfer && e.dataTransfer.files.length) add(e.dataTransfer.files); });

  demo.addEventListener("click", async () => {
    demo.disabled = true;
    text(demo, "preparing the demo image…");
    try {
      // One demo specimen per lab: a second click opens the one already measured.
      const known = await fetch("/demo/specimen");
      if (known.ok) {
        const found = await known.json();
        if (found.report_url) { window.location.assign(found.report_url); return; }
      }
      const answer = await fetch(demo.dataset.url);
      if (!answer.ok) throw new Error("the server answered " + answer.status);
      const blob = await answer.blob();
      const file = new File([blob], demo.dataset.filename, { type: "image/jpeg" });
      add([file], { label: demo.dataset.label, kind: "electrodeposit", pixel_size_mm: "" });
    } catch (err) {
      alert("The demo image could not be made: " + err.message);
    } finally {
      demo.disabled = false;
      text(demo, "Measure the demo specimen");
    }
  });
})();
