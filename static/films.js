// Film page: send the film (XHR, upload progress), then ask the service how far the analysis is
// (GET /api/films/progress/TOKEN) until it answers, then open the film's report.
(function () {
  "use strict";
  const form = document.getElementById("film-form");
  const picker = document.getElementById("film-files");
  const bar = document.getElementById("film-bar");
  const note = document.querySelector("#film-status span");
  const IMAGE = /\.(png|jpe?g|bmp)$/i;

  function say(s) { note.textContent = s; }

  function token() {
    const bytes = new Uint8Array(18);
    crypto.getRandomValues(bytes);
    return Array.from(bytes, (b) => b.toString(16).padStart(2, "0")).join("");
  }

  form.addEventListener("submit", (event) => {
    event.preventDefault();
    const files = Array.from(picker.files);
    if (!files.length) return;
    const data = new FormData();
    if (files.length > 1 || IMAGE.test(files[0].name)) {
      for (const f of files) data.append("frames", f, f.name);
    } else {
      data.append("film", files[0], files[0].name);
    }
    for (const name of ["frame_interval_s", "rim_radius_mm", "pixel_size_mm", "label"]) {
      const value = form.elements[name].value.trim();
      if (value !== "") data.append(name, value);
    }
    const tag = token();
    data.append("progress_token", tag);
    const xhr = new XMLHttpRequest();
    xhr.open("POST", "/api/films");
    xhr.responseType = "json";
    bar.hidden = false;
    bar.value = 0;
    let polling = null;
    xhr.upload.onprogress = (e) => {
      if (!e.lengthComputable) return;
      bar.value = Math.round((100 * e.loaded) / e.total);
      say("uploading " + bar.value + "%");
    };
    xhr.upload.onload = () => {
      bar.removeAttribute("value");
      say("reading the last frame…");
      polling = setInterval(async () => {
        const answer = await fetch("/api/films/progress/" + tag, { credentials: "same-origin" });
        if (!answer.ok) return;
        const p = await answer.json();
        if (p.stage === "frames" && p.total) {
          bar.max = p.total;
          bar.value = p.done;
          say("frame " + p.done + " of " + p.total + " read");
        } else if (p.stage === "done") {
          say("comparing with the reference families…");
        }
      }, 1000);
    };
    xhr.onloadend = () => {
      if (polling) clearInterval(polling);
      if (xhr.status === 201 && xhr.response) {
        say("done");
        window.location.assign(xhr.response.report_url);
      } else {
        bar.hidden = true;
        const detail = xhr.response && xhr.response.detail ? xhr.response.detail : "the upload failed";
        say("Not analysed: " + (typeof detail === "string" ? detail : JSON.stringify(detail)));
      }
    };
    xhr.send(data);
  });
})();
