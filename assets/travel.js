/* Settings travel (app/travel.py): after a choices file is picked, the file field is emptied,
   so that picking the same file again (after changing something) applies it again. */
(function () {
  document.addEventListener("change", function (e) {
    var t = e.target;
    if (t && t.type === "file" && t.closest && t.closest("#travel-import")) {
      window.setTimeout(function () { t.value = ""; }, 0);
    }
  }, false);
})();
