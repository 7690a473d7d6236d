/* Page layout: the header's and the groups bar's heights as CSS variables (--head-h,
   --bar-h), so the sticky bar, the settings column and the section anchors sit right under
   them whatever the width (the navigation wraps to one or two lines). */
(function () {
  function measure() {
    var root = document.documentElement;
    var head = document.querySelector(".cl-head");
    var bar = document.querySelector(".cl-selection");
    if (head) { root.style.setProperty("--head-h", head.offsetHeight + "px"); }
    if (bar) { root.style.setProperty("--bar-h", bar.offsetHeight + "px"); }
    return head && bar;
  }
  function start() {
    if (!measure()) { window.setTimeout(start, 200); return; }
    if (window.ResizeObserver) {
      var ro = new ResizeObserver(measure);
      ro.observe(document.querySelector(".cl-head"));
      ro.observe(document.querySelector(".cl-selection"));
    }
    window.addEventListener("resize", measure);
  }
  start();
})();
