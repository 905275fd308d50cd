// The API page: send one request from the browser and show its answer (status, type, body).
(function () {
  "use strict";
  const LIMIT = 4000; // characters of the answer shown

  function target(form) {
    let path = form.dataset.path;
    const query = new URLSearchParams();
    for (const input of form.querySelectorAll("input[data-in=path], input[data-in=query]")) {
      if (!input.value) continue;
      if (input.dataset.in === "path") path = path.replace("{" + input.name + "}", encodeURIComponent(input.value));
      else query.append(input.name, input.value);
    }
    const q = query.toString();
    return path + (q ? "?" + q : "");
  }

  function body(form) {
    const kind = form.dataset.body;
    if (kind === "multipart/form-data") {
      const data = new FormData();
      for (const input of form.querySelectorAll("input[data-in=form]")) {
        if (input.type === "file") { if (input.files.length) data.append(input.name, input.files[0]); }
        else if (input.value) data.append(input.name, input.value);
      }
      return { body: data, headers: {} };
    }
    if (kind) {
      const text = form.querySelector("textarea[data-in=body]").value;
      return { body: text, headers: { "Content-Type": kind } };
    }
    return { body: undefined, headers: {} };
  }

  for (const form of document.querySelectorAll("form.try-form")) {
    form.addEventListener("submit", async (event) => {
      event.preventDefault();
      const out = form.querySelector(".try-answer");
      const url = target(form);
      if (url.includes("{")) { out.textContent = "fill in every path parameter first"; return; }
      if (form.dataset.method === "DELETE" && !window.confirm("Really send DELETE " + url + "?")) return;
      const { body: payload, headers } = body(form);
      out.textContent = "sending " + form.dataset.method + " " + url + " …";
      try {
        const answer = await fetch(url, { method: form.dataset.method, body: payload, headers, credentials: "same-origin" });
        const type = answer.headers.get("content-type") || "";
        let text;
        if (type.includes("json")) text = JSON.stringify(await answer.json(), null, 2);
        else if (type.startsWith("text/")) text = await answer.text();
        else text = "(" + type + ", " + (await answer.blob()).size + " bytes)";
        if (text.length > LIMIT) text = text.slice(0, LIMIT) + "\n… (" + (text.length - LIMIT) + " more characters)";
        out.replaceChildren();
        const head = document.createElement("p");
        head.className = "try-status " + (answer.ok ? "ok" : "failed");
        head.textContent = answer.status + " " + answer.statusText + " · " + (type || "no body");
        const pre = document.createElement("pre");
        pre.textContent = text;
        out.append(head, pre);
      } catch (err) {
        out.textContent = "the request failed: " + err.message;
      }
    });
  }
})();
