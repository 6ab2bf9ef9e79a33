// Live run page: polls the run's state every two seconds and updates the page in place.
(function () {
  "use strict";
  var box = document.getElementById("live");
  if (!box) { return; }
  var stateUrl = box.dataset.stateUrl, pngUrl = box.dataset.pngUrl;
  var events = document.getElementById("events");
  var lastShot = "";
  function lastId() {
    var items = events.querySelectorAll("li[data-id]");
    return items.length ? items[items.length - 1].dataset.id : 0;
  }
  function text(id, value) { document.getElementById(id).textContent = value; }
  function eta(s) {
    if (s === null || s === undefined) { return "—"; }
    s = Math.round(s);
    return Math.floor(s / 60) + " min " + String(s % 60).padStart(2, "0") + " s";
  }
  function poll() {
    fetch(stateUrl + "?after=" + lastId(), {credentials: "same-origin"})
      .then(function (r) { if (!r.ok) { throw new Error(r.status); } return r.json(); })
      .then(function (d) {
        text("state", d.state);
        text("status", d.status);
        text("serial", d.serial || "—");
        text("temperature", d.temperature_C === null ? "—" : d.temperature_C.toFixed(1) + " °C");
        text("point", d.point || "—");
        text("done", d.done);
        text("todo", d.total - d.done);
        text("eta", eta(d.eta_s));
        var bar = document.getElementById("progress");
        bar.max = d.total; bar.value = d.done;
        d.events.forEach(function (e) {
          var li = document.createElement("li");
          li.className = e.kind.replace(/ /g, "-");
          li.dataset.id = e.id;
          var t = document.createElement("time");
          t.textContent = e.time.substring(11, 19);
          var k = document.createElement("span");
          k.className = "kind"; k.textContent = e.kind;
          li.appendChild(t); li.appendChild(document.createTextNode(" "));
          li.appendChild(k); li.appendChild(document.createTextNode(" " + e.message));
          events.appendChild(li);
        });
        if (d.last) {
          var key = d.done + ":" + d.last.serial + ":" + d.last.label + ":" + d.updated;
          if (key !== lastShot) {
            lastShot = key;
            document.getElementById("last-waveform").src = pngUrl + "?v=" + encodeURIComponent(key);
            text("last-caption", "last shot: " + d.last.serial + " " + d.last.label +
                 (d.last.valid ? "" : " (invalid)"));
          }
        }
        if (d.state === "running") { setTimeout(poll, 2000); }
      })
      .catch(function () { setTimeout(poll, 5000); });
  }
  setTimeout(poll, 1000);
}());
