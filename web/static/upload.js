// Drag and drop onto the upload form: dropped files go into the file input; the names are listed as text.
(function () {
  "use strict";
  var drop = document.getElementById("drop");
  var input = document.getElementById("file");
  var list = document.getElementById("chosen");
  if (!drop || !input || !list) { return; }
  function show() {
    while (list.firstChild) { list.removeChild(list.firstChild); }
    for (var i = 0; i < input.files.length; i++) {
      var li = document.createElement("li");
      li.textContent = input.files[i].name + " (" + Math.ceil(input.files[i].size / 1024) + " kB)";
      list.appendChild(li);
    }
  }
  input.addEventListener("change", show);
  ["dragenter", "dragover"].forEach(function (ev) {
    drop.addEventListener(ev, function (e) { e.preventDefault(); drop.classList.add("over"); });
  });
  ["dragleave", "drop"].forEach(function (ev) {
    drop.addEventListener(ev, function (e) { e.preventDefault(); drop.classList.remove("over"); });
  });
  drop.addEventListener("drop", function (e) {
    if (e.dataTransfer && e.dataTransfer.files.length) { input.files = e.dataTransfer.files; show(); }
  });
}());
