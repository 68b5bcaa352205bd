// Job page: poll the job's JSON status, move the progress bar, reload the page when the job ends
// (the server then renders the result link or the one-line error). No inline script: CSP script-src 'self'.
(function () {
  "use strict";
  const box = document.getElementById("job");
  if (!box) return;
  const url = box.dataset.statusUrl;
  const bar = document.getElementById("job-progress");
  const text = document.getElementById("job-text");
  const state = document.getElementById("job-state");
  let delay = 500;
  function poll() {
    fetch(url, { headers: { Accept: "application/json" }, credentials: "same-origin" })
      .then(function (r) { return r.ok ? r.json() : Promise.reject(r.status); })
      .then(function (j) {
        bar.value = j.progress_fraction;
        text.textContent = j.progress_text;
        state.textContent = j.state;
        if (j.state === "done" || j.state === "failed") {
          window.location.reload();
          return;
        }
        delay = Math.min(delay * 1.5, 3000);
        window.setTimeout(poll, delay);
      })
      .catch(function () { window.setTimeout(poll, 5000); });
  }
  window.setTimeout(poll, delay);
})();
