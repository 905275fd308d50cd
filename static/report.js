// Report page: deleting a specimen asks first, then returns to the list.
(function () {
  "use strict";
  const button = document.getElementById("delete-button");
  if (!button) return;
  button.addEventListener("click", async () => {
    if (!confirm("Delete this specimen, its pictures and its measurements?")) return;
    const answer = await fetch("/api/specimens/" + encodeURIComponent(button.dataset.id), { method: "DELETE" });
    if (answer.status === 204) window.location.assign("/specimens");
    else alert("Not deleted: the server answered " + answer.status);
  });
})();
