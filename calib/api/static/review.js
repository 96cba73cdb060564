// calib review pages: hold the approval token for this tab and send decisions.
// The token lives in the variable `held` only: never in a cookie, never in browser storage.
(function () {
  "use strict";
  var held = { by: "", token: "" };

  function say(el, text, kind) {
    if (!el) { return; }
    el.textContent = text;
    el.className = el.className.replace(/\s*\b(ok|bad)\b/g, "") + (kind ? " " + kind : "");
    el.hidden = false;
  }

  function showHeld() {
    var state = document.getElementById("token-state");
    if (!state) { return; }
    if (held.token) {
      say(state, "Deciding as " + held.by + ". The token is held in this tab's memory only; " +
        "reloading or closing the tab forgets it.", "ok");
    } else {
      say(state, "No token held. Type your name and the approval token to approve or reject; " +
        "nothing is kept in cookies or browser storage.", "");
    }
  }

  function detailOf(body) {
    var d = body && body.detail;
    if (typeof d === "string") { return d; }
    if (Array.isArray(d)) { return d.map(function (x) { return x.msg || String(x); }).join("; "); }
    return "no reason given";
  }

  // While a token is held, links between review pages are followed inside this page (the
  // page's <main> is swapped and the address updated), so the token is typed once per tab.
  function load(url, push) {
    return fetch(url, { cache: "no-store", credentials: "omit" })
      .then(function (r) { return r.text(); })
      .then(function (text) {
        var doc = new DOMParser().parseFromString(text, "text/html");
        var fresh = doc.querySelector("main");
        var main = document.querySelector("main");
        if (!fresh || !main) { window.location.assign(url); return; }
        main.replaceWith(document.adoptNode(fresh));
        document.title = doc.title;
        if (push) {
          window.history.pushState({ review: true }, "", url);
          window.scrollTo(0, 0);
        }
      });
  }

  function refresh() {
    return load(window.location.href, false);
  }

  function follow(url) {
    var flash = document.getElementById("flash");
    if (flash) { flash.hidden = true; }
    load(url, true).catch(function () { window.location.assign(url); });
  }

  function inPage(a, ev) {
    return held.token && a.origin === window.location.origin && !a.target &&
      !/^\/(v1|static)\/|\.png$/.test(a.pathname) &&
      ev.button === 0 && !(ev.ctrlKey || ev.metaKey || ev.shiftKey || ev.altKey);
  }

  document.addEventListener("click", function (ev) {
    var a = ev.target.closest && ev.target.closest("a[href]");
    if (a && inPage(a, ev)) {
      ev.preventDefault();
      follow(a.href);
    }
  });

  window.addEventListener("popstate", function () {
    load(window.location.href, false).catch(function () { window.location.reload(); });
  });

  function decide(form, action) {
    var msg = form.querySelector(".msg");
    var run = form.getAttribute("data-run");
    var note = form.elements.note.value.trim();
    if (!held.token) {
      say(msg, "Type your name and the approval token at the top of the page first.", "bad");
      return;
    }
    if (!note) {
      say(msg, "Write a note: it is recorded with the decision.", "bad");
      return;
    }
    var buttons = form.querySelectorAll("button");
    buttons.forEach(function (b) { b.disabled = true; });
    fetch("/v1/runs/" + encodeURIComponent(run) + "/" + action, {
      method: "POST",
      credentials: "omit",
      cache: "no-store",
      headers: { "Authorization": "Bearer " + held.token, "Content-Type": "application/json" },
      body: JSON.stringify({ by: held.by, note: note })
    }).then(function (r) {
      return r.json().catch(function () { return {}; }).then(function (body) {
        return { status: r.status, body: body };
      });
    }).then(function (res) {
      if (res.status === 200) {
        var done = action === "approve" ? "approved: it is now the set in force" : "rejected";
        say(document.getElementById("flash"), "Run " + run + " " + done + " (by " + held.by +
          ").", "ok");
        return refresh();
      }
      if (res.status === 401) {
        held.token = "";
        showHeld();
        say(msg, "Refused: the server did not accept the token. Nothing was changed; " +
          "type the token again.", "bad");
        return null;
      }
      say(msg, "Refused (" + res.status + "): " + detailOf(res.body) + ". Nothing was changed.",
        "bad");
      return null;
    }).catch(function (err) {
      say(msg, "The server could not be reached (" + err + "); nothing was changed.", "bad");
    }).finally(function () {
      buttons.forEach(function (b) { b.disabled = false; });
    });
  }

  document.addEventListener("submit", function (ev) {
    var form = ev.target;
    if (form.id === "token-form") {
      ev.preventDefault();
      held.by = form.elements.by.value.trim();
      held.token = form.elements.token.value;
      form.elements.token.value = "";
      showHeld();
    } else if (form.classList.contains("asof-form") && held.token) {
      ev.preventDefault();
      var query = new URLSearchParams(new FormData(form)).toString();
      follow(form.action + (query ? "?" + query : ""));
    } else if (form.classList.contains("decide")) {
      ev.preventDefault();
      decide(form, ev.submitter && ev.submitter.value === "reject" ? "reject" : "approve");
    }
  });
}());
