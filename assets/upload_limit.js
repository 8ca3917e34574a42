// A file over the upload limit would be refused by the server with no word in the page;
// say so at once instead. The limit is published by the page header (data-max-bytes).
(function () {
  function limit() {
    var el = document.querySelector("[data-max-bytes]");
    return el ? parseInt(el.getAttribute("data-max-bytes"), 10) : 0;
  }
  function warn(file) {
    var note = document.getElementById("upload-note");
    if (!note) return;
    var mb = function (n) { return (n / 1e6).toFixed(1); };
    note.textContent = "";
    var div = document.createElement("div");
    div.className = "note note-error";
    div.setAttribute("role", "alert");
    div.textContent = file.name + ": the file is " + mb(file.size) + " MB; the limit is " + mb(limit()) + " MB.";
    note.appendChild(div);
  }
  function check(files, ev) {
    var max = limit();
    if (!max || !files) return;
    for (var i = 0; i < files.length; i++) {
      if (files[i].size > max) { warn(files[i]); if (ev) { ev.stopImmediatePropagation(); ev.preventDefault(); } return; }
    }
  }
  document.addEventListener("change", function (ev) {
    var t = ev.target;
    if (t && t.type === "file" && t.closest && t.closest("#upload")) { check(t.files, ev); if (t.files && t.files.length && t.files[0].size > limit()) t.value = ""; }
  }, true);
  document.addEventListener("drop", function (ev) {
    var t = ev.target;
    if (t && t.closest && t.closest("#upload") && ev.dataTransfer) check(ev.dataTransfer.files, ev);
  }, true);
})();
