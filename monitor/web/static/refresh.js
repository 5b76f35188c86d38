// Renders the board again every data-refresh seconds, so a wall screen stays current.
// It waits while someone is typing or has a section open, and can be paused: a page
// that reloads under a nurse's hands loses what they typed (and WCAG 2.2.1 asks that
// timing be adjustable). Served from this host; the board loads nothing from elsewhere.
(function () {
  "use strict";
  var seconds = parseInt(document.body.getAttribute("data-refresh") || "0", 10);
  var button = document.getElementById("refresh-toggle");
  var state = document.getElementById("refresh-state");
  if (!seconds || !button || !state) { return; }
  var paused = false;
  var left = seconds;
  button.hidden = false;
  function busy() {
    var el = document.activeElement;
    var typing = el && (el.tagName === "INPUT" || el.tagName === "TEXTAREA") && el.value !== el.defaultValue;
    return typing || (el && el.tagName === "INPUT") || document.querySelector("details[open]") !== null;
  }
  function show() {
    state.textContent = paused ? "Automatic refresh paused." :
      "This page renders again in " + left + " s" + (busy() ? " (waiting while you type)." : ".");
  }
  button.addEventListener("click", function () {
    paused = !paused;
    button.textContent = paused ? "Resume refresh" : "Pause refresh";
    left = seconds;
    show();
  });
  setInterval(function () {
    if (paused) { return; }
    if (busy()) { show(); return; }
    left -= 1;
    if (left <= 0) { window.location.reload(); return; }
    if (left % 5 === 0) { show(); }
  }, 1000);
  show();
})();
