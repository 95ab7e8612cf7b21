// Account page: picking a window (a chart column or a row link) loads that window's
// evidence in place instead of reloading the page. Without JavaScript the same links
// (?window=ID) load the page with that window selected, so this is only an enhancement.
(function () {
  "use strict";

  function windowLink(target) {
    while (target && target !== document) {
      if (target.localName === "a" && target.hasAttribute("data-window")) {
        return target;
      }
      target = target.parentNode;
    }
    return null;
  }

  function hrefOf(link) {
    // SVG <a> elements keep href as an SVGAnimatedString.
    var raw = link.getAttribute("href") || link.getAttribute("xlink:href");
    return new URL(raw, window.location.href);
  }

  function swap(url, push) {
    var main = document.getElementById("main");
    var evidence = document.getElementById("evidence");
    if (evidence) {
      evidence.classList.add("loading");
    }
    return fetch(url.toString(), { credentials: "same-origin", headers: { "Accept": "text/html" } })
      .then(function (response) {
        if (response.redirected || !response.ok) {
          throw new Error("page answered " + response.status);
        }
        return response.text();
      })
      .then(function (html) {
        var doc = new DOMParser().parseFromString(html, "text/html");
        var fresh = doc.getElementById("main");
        if (!fresh) {
          throw new Error("no page content");
        }
        main.replaceChildren.apply(main, Array.prototype.slice.call(fresh.childNodes));
        if (push) {
          window.history.pushState({ rolewatchWindow: true }, "", url.toString());
        }
        var heading = document.getElementById("evidence-heading");
        if (heading) {
          heading.setAttribute("tabindex", "-1");
          heading.focus({ preventScroll: true });
        }
      })
      .catch(function () {
        // Fall back on an ordinary page load (it also handles an expired sign-in).
        window.location.assign(url.toString());
      });
  }

  document.addEventListener("click", function (event) {
    if (event.defaultPrevented || event.button !== 0 || event.metaKey || event.ctrlKey ||
        event.shiftKey || event.altKey) {
      return;
    }
    var link = windowLink(event.target);
    if (!link) {
      return;
    }
    event.preventDefault();
    swap(hrefOf(link), true);
  });

  window.addEventListener("popstate", function () {
    swap(new URL(window.location.href), false);
  });
})();
