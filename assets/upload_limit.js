/* Upload size limit: the upload box carries its limit and message (data-max-bytes,
   data-too-large, data-msg-id, written by app/layout.py upload_box). dcc.Upload's max_size
   refuses a larger file without a word; this says why, beside the control, before anything
   is sent. */
(function () {
  function sizeText(n) {
    return n >= 1048576 ? (n / 1048576).toFixed(0) + " MB" : (n / 1024).toFixed(0) + " KB";
  }
  function shortName(name) {
    return name.length > 80 ? name.slice(0, 79) + "\u2026" : name;
  }
  function check(box, files) {
    if (!box || !files || !files.length) { return; }
    var limit = Number(box.getAttribute("data-max-bytes"));
    var msgId = box.getAttribute("data-msg-id");
    for (var i = 0; i < files.length; i++) {
      var f = files[i];
      if (limit >= 0 && f.size > limit) {
        var text = box.getAttribute("data-too-large")
          .replace("{name}", shortName(f.name)).replace("{size}", sizeText(f.size));
        if (window.dash_clientside && window.dash_clientside.set_props) {
          window.dash_clientside.set_props(msgId, {children: text});
        } else {
          var el = document.getElementById(msgId);
          if (el) { el.textContent = text; }
        }
        return;
      }
    }
  }
  function boxOf(target) {
    return target && target.closest ? target.closest("[data-max-bytes]") : null;
  }
  document.addEventListener("change", function (e) {
    var t = e.target;
    if (t && t.type === "file") { check(boxOf(t), t.files); }
  }, true);
  document.addEventListener("drop", function (e) {
    check(boxOf(e.target), e.dataTransfer && e.dataTransfer.files);
  }, true);
})();
