// leaktally responder page: every 5 s, fetch this page again and swap the
// fresh <main> in, so the figures stay current without a reload (which
// would jump the scroll position on a phone). Nothing is computed here: the
// server renders every figure. When the agent cannot be reached, the
// banner says so and the old figures stay, with their "as of" time.
(function () {
  "use strict";
  var PERIOD_MS = 5000;

  function offline(yes) {
    var banner = document.getElementById("offline");
    if (banner) {
      banner.hidden = !yes;
    }
    document.body.classList.toggle("is-offline", yes);
  }

  function swap(html) {
    var next = new DOMParser().parseFromString(html, "text/html");
    var fresh = next.getElementById("live");
    var live = document.getElementById("live");
    if (!fresh || !live) {
      throw new Error("unexpected page");
    }
    live.replaceWith(document.importNode(fresh, true));
    document.title = next.title;
  }

  function tick() {
    fetch(window.location.pathname, { cache: "no-store", credentials: "same-origin" })
      .then(function (response) {
        if (!response.ok) {
          throw new Error("HTTP " + response.status);
        }
        return response.text();
      })
      .then(function (html) {
        swap(html);
        offline(false);
      })
      .catch(function () {
        offline(true);
      })
      .then(function () {
        window.setTimeout(tick, PERIOD_MS);
      });
  }

  window.setTimeout(tick, PERIOD_MS);
})();
