(function () {
  "use strict";
  var list = document.getElementById("rowlist");
  var box = document.getElementById("controls");
  if (!list || !box) { return; }
  var rows = Array.prototype.slice.call(list.querySelectorAll("details.row"));
  var fv = document.getElementById("f-verdict");
  var fb = document.getElementById("f-bucket");
  var fs = document.getElementById("f-sort");
  var fc = document.getElementById("f-count");
  rows.forEach(function (r, i) { r.setAttribute("data-i", String(i)); });

  function num(r, key) {
    var x = parseFloat(r.getAttribute("data-" + key));
    return isNaN(x) ? null : x;
  }

  function apply(remember) {
    var v = fv.value, b = fb.value, s = fs.value, shown = 0;
    var key = s ? s.charAt(0) : "i", dir = s && s.charAt(1) === "-" ? -1 : 1;
    var order = rows.slice().sort(function (a, c) {
      var x = num(a, key), y = num(c, key);
      if (x === null && y === null) { return num(a, "i") - num(c, "i"); }
      if (x === null) { return 1; }
      if (y === null) { return -1; }
      return (x - y) * dir || num(a, "i") - num(c, "i");
    });
    order.forEach(function (r) {
      var keep = (!v || r.getAttribute("data-v") === v) && (!b || r.getAttribute("data-b") === b);
      r.hidden = !keep;
      if (keep) { shown += 1; }
      list.appendChild(r);
    });
    fc.textContent = "showing " + shown + " of " + rows.length + " rows";
    if (!remember) { return; }
    var state = [];
    if (v) { state.push("v=" + encodeURIComponent(v)); }
    if (b) { state.push("b=" + encodeURIComponent(b)); }
    if (s) { state.push("s=" + encodeURIComponent(s)); }
    try {
      history.replaceState(null, "", state.length ? "#" + state.join("&") : location.pathname + location.search);
    } catch (e) { /* some viewers forbid history changes on local files */ }
  }

  function pick(sel, value) {
    for (var i = 0; i < sel.options.length; i += 1) {
      if (sel.options[i].value === value) { sel.selectedIndex = i; return; }
    }
  }

  location.hash.replace(/^#/, "").split("&").forEach(function (part) {
    var kv = part.split("="), val;
    if (kv.length !== 2) { return; }
    try { val = decodeURIComponent(kv[1]); } catch (e) { return; }
    if (kv[0] === "v") { pick(fv, val); }
    if (kv[0] === "b") { pick(fb, val); }
    if (kv[0] === "s") { pick(fs, val); }
  });
  [fv, fb, fs].forEach(function (sel) { sel.addEventListener("change", function () { apply(true); }); });
  box.hidden = false;
  apply(false);
  document.documentElement.setAttribute("data-script", "ready");
}());
