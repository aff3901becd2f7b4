(function () {
  "use strict";
  var data = JSON.parse(document.getElementById("oddling-data").textContent);
  var storeKey = data.storagePrefix + data.runId;
  var list = document.getElementById("cards");
  var cards = Array.prototype.slice.call(list.children);
  var $ = function (id) { return document.getElementById(id); };

  // Reference thumbnails are stored once in the data block and shared by every card showing them.
  Array.prototype.forEach.call(document.querySelectorAll("img[data-ref]"), function (img) {
    var src = data.refs[img.getAttribute("data-ref")];
    if (src) { img.src = src; }
  });

  var marks = {};
  function storageFailed() { $("storage-note").hidden = false; }
  try { marks = JSON.parse(window.localStorage.getItem(storeKey) || "{}") || {}; } catch (e) { storageFailed(); }
  function save() {
    try { window.localStorage.setItem(storeKey, JSON.stringify(marks)); } catch (e) { storageFailed(); }
  }

  function showMark(card) {
    var decision = marks[card.getAttribute("data-path")] || "";
    card.setAttribute("data-decision", decision);
    Array.prototype.forEach.call(card.querySelectorAll(".mark"), function (b) {
      var value = b.getAttribute("data-decision");
      if (value === "") { b.hidden = !decision; return; }   // "clear" only when there is something to clear
      b.setAttribute("aria-pressed", String(value === decision));
    });
    card.querySelector(".decision-state").textContent = decision ? "Decision: " + decision : "No decision yet";
  }

  list.addEventListener("click", function (event) {
    var button = event.target.closest(".mark");
    if (!button) { return; }
    var card = button.closest(".card");
    var path = card.getAttribute("data-path");
    var decision = button.getAttribute("data-decision");
    if (decision) { marks[path] = decision; } else { delete marks[path]; }   // only "clear" clears
    save();
    showMark(card);
    apply();
  });

/*CSV_CELLS*/
  function decisionsCsv() {
    // The scored folder travels with the marks, so `oddling bank add` needs no --root.
    var lines = ["path,decision,scored_folder"];
    var folder = csvField(csvText(data.scoredFolder || ""));
    cards.forEach(function (card) {   // in rank order, as on the page
      var path = card.getAttribute("data-path");
      if (marks[path]) { lines.push(csvField(csvText(path)) + "," + marks[path] + "," + folder); }
    });
    return lines.join("\n") + "\n";
  }
  window.oddlingDecisionsCsv = decisionsCsv;   // for tests and for copying from the console

  $("export").addEventListener("click", function () {
    var url = URL.createObjectURL(new Blob([decisionsCsv()], {type: "text/csv"}));
    var link = document.createElement("a");
    link.href = url;
    link.download = "decisions-" + data.runId + ".csv";
    document.body.appendChild(link);
    link.click();
    document.body.removeChild(link);
    setTimeout(function () { URL.revokeObjectURL(url); }, 1000);
  });

  var rankOrder = cards.slice();
  function number(id) {
    var input = $(id);
    var value = input.value === "" ? NaN : Number(input.value);
    return isFinite(value) ? value : null;
  }
  function apply() {
    var flaggedOnly = $("f-flagged").checked;
    var kind = $("f-kind") ? $("f-kind").value : "";
    var decision = $("f-decision").value;
    var low = number("f-min"), high = number("f-max");
    var order = $("f-sort").value;
    var sorted = rankOrder.slice();
    if (order === "score-asc") { sorted.reverse(); }
    if (order === "name") {
      sorted.sort(function (a, b) {
        var x = a.getAttribute("data-path"), y = b.getAttribute("data-path");
        return x < y ? -1 : x > y ? 1 : 0;
      });
    }
    var shown = 0;
    sorted.forEach(function (card) {
      var score = Number(card.getAttribute("data-score"));
      var mark = marks[card.getAttribute("data-path")] || "(none)";
      var ok = (!flaggedOnly || card.getAttribute("data-flagged") === "1")
        && (!kind || card.getAttribute("data-kind") === kind)
        && (!decision || mark === decision)
        && (low === null || score >= low) && (high === null || score <= high);
      card.hidden = !ok;
      if (ok) { shown += 1; }
      list.appendChild(card);
    });
    cards = sorted;
    var counter = $("match-count");
    var scored = Number(counter.getAttribute("data-scored"));
    var text;
    if (rankOrder.length === 0) {
      text = "No scored images to show.";
    } else {
      text = shown === rankOrder.length ? "All " + shown + " cards shown"
        : shown + " of " + rankOrder.length + " cards match the filters";
      if (scored > rankOrder.length) {
        text += "; this page holds the top " + rankOrder.length + " of " + scored +
          " scored images (every row is in the scores CSV)";
      }
      if (low !== null && high !== null && low > high) {
        text += ". The score range is inverted (from " + low + " to " + high + "): no card can match";
      }
      text += ".";
    }
    counter.textContent = text;
    $("export").disabled = rankOrder.length === 0;
  }
  var controls = $("controls");
  controls.addEventListener("input", apply);
  controls.addEventListener("change", apply);
  controls.addEventListener("submit", function (event) { event.preventDefault(); });
  controls.addEventListener("reset", function () { setTimeout(apply, 0); });

  rankOrder.forEach(showMark);
  apply();
}());
