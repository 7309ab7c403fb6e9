// Keyboard shortcuts of the review pages. Every action also has a link, a button or a form
// field, so the pages work without this script.
(function () {
  "use strict";

  function typing(target) {
    if (!target || !target.tagName) return false;
    var tag = target.tagName.toLowerCase();
    return tag === "textarea" || tag === "select" ||
      (tag === "input" && !["radio", "checkbox", "button", "submit"].includes(target.type)) ||
      target.isContentEditable;
  }

  function follow(id) {
    var link = document.getElementById(id);
    if (link && link.href) window.location.assign(link.href);
  }

  function choose(value) {
    var choice = document.getElementById("decision-" + value);
    var note = document.getElementById("note");
    if (!choice) return;
    choice.checked = true;
    if (note) note.focus();
  }

  function record(form) {
    if (typeof form.requestSubmit === "function") form.requestSubmit();
    else form.submit();
  }

  document.addEventListener("keydown", function (event) {
    var form = document.getElementById("decision-form");
    if (event.key === "Enter" && (event.ctrlKey || event.metaKey) && form &&
        form.contains(event.target)) {
      event.preventDefault();
      record(form);
      return;
    }
    if (event.key === "Escape" && typing(event.target)) {
      event.target.blur();
      return;
    }
    if (event.ctrlKey || event.metaKey || event.altKey || typing(event.target)) return;
    var rows = document.querySelectorAll("a.respondent-link");
    if (rows.length && (event.key === "j" || event.key === "k")) {
      // The queue: j / k move to the next / previous respondent's link; Enter opens it.
      var at = Array.prototype.indexOf.call(rows, document.activeElement);
      var to = event.key === "j" ? Math.min(at + 1, rows.length - 1) : Math.max(at - 1, 0);
      event.preventDefault();
      rows[at < 0 ? 0 : to].focus();
      return;
    }
    var keys = {
      n: function () { follow("go-next"); },
      p: function () { follow("go-previous"); },
      q: function () { follow("go-queue"); },
      k: function () { choose("keep"); },
      x: function () { choose("exclude"); },
      u: function () { choose("undecided"); },
      e: function () { var note = document.getElementById("note"); if (note) note.focus(); },
      "?": function () { var keys = document.getElementById("keys"); if (keys) keys.open = !keys.open; },
    };
    var action = keys[event.key];
    if (!action) return;
    event.preventDefault();
    action();
  });

  // The decision form: a decision must be chosen before recording (the server says so too).
  document.addEventListener("submit", function (event) {
    var form = event.target;
    if (form.id !== "decision-form") return;
    if (!form.querySelector("input[name=decision]:checked")) {
      event.preventDefault();
      var first = document.getElementById("decision-keep");
      if (first) first.focus();
      var help = document.getElementById("note-help");
      if (help) help.textContent = "Choose keep, exclude or undecided first (k, x or u).";
    }
  });
})();
