/* Presentation mode (app/presentation.py): while <body> has the class "cl-present", the
   keyboard steps through the page's sections one screen at a time. Page Down, arrow down or
   right, or the space bar: next section; Page Up, arrow up or left: previous; Home: the top;
   Escape: leave presentation mode (the header's toggle). Keys typed into a field, a dropdown
   or a figure's controls are left alone. */
(function () {
  function sections() {
    return Array.prototype.filter.call(
      document.querySelectorAll(".cl-main > .cl-summary, .cl-main .cl-section"),
      function (el) { return el.offsetParent !== null; });
  }
  /* what stays fixed at the top above a section once it is scrolled to: the header, and the
     sticky groups bar for the sections after it */
  function fixedAbove(target) {
    var head = document.querySelector(".cl-head");
    var bottom = head ? head.getBoundingClientRect().height : 0;
    var bar = document.querySelector(".cl-selection");
    if (bar && bar.offsetParent !== null && getComputedStyle(bar).position === "sticky" &&
        (bar.compareDocumentPosition(target) & Node.DOCUMENT_POSITION_FOLLOWING)) {
      bottom += bar.getBoundingClientRect().height;
    }
    return bottom;
  }
  function current(list) {
    var index = 0;
    for (var i = 0; i < list.length; i++) {
      if (list[i].getBoundingClientRect().top <= fixedAbove(list[i]) + 12) { index = i; }
    }
    return index;
  }
  function go(step) {
    var list = sections();
    if (!list.length) { return; }
    var at = current(list), here = list[at], box = here.getBoundingClientRect();
    var fixed = fixedAbove(here);
    /* a section taller than the screen is shown one screen at a time */
    if (step === 1 && box.bottom > window.innerHeight + 4) {
      var next = list[at + 1];
      if (!next || next.getBoundingClientRect().top > window.innerHeight) {
        window.scrollBy({top: window.innerHeight - fixed - 48, behavior: "instant"});
        return;
      }
    }
    if (step === -1 && box.top < fixed - 4) {
      window.scrollBy({top: box.top - fixed - 6, behavior: "instant"});
      return;
    }
    var i = step === "home" ? 0 : at + step;
    i = Math.max(0, Math.min(list.length - 1, i));
    var target = list[i];
    var y = window.scrollY + target.getBoundingClientRect().top - fixedAbove(target) - 6;
    window.scrollTo({top: i === 0 ? 0 : Math.max(0, y), behavior: "instant"});
    list.forEach(function (el) {
      if (el === target) { el.setAttribute("data-present-current", "1"); }
      else { el.removeAttribute("data-present-current"); }
    });
  }
  function typing(el) {
    if (!el || el === document.body) { return false; }
    if (el.isContentEditable) { return true; }
    var tag = el.tagName;
    if (tag === "INPUT" || tag === "TEXTAREA" || tag === "SELECT") { return true; }
    return !!(el.closest && el.closest(".dash-dropdown, .Select, [role=listbox], [role=combobox]"));
  }
  /* figures: every font of a figure grows by SCALE while presenting. Idempotent: a figure
     remembers the base font size it was scaled from, and a figure the page redraws (new
     layout from the server) is scaled again on the next check. */
  var SCALE = 1.35;
  /* a size set in the figure's layout, else in its template (the figures' shared look) */
  function get(obj, path) {
    return path.split(".").reduce(function (o, k) { return o && o[k]; }, obj);
  }
  function sizeAt(layout, path, templatePath) {
    var v = get(layout, path);
    return typeof v === "number" ? v : get(layout.template && layout.template.layout,
                                           templatePath || path);
  }
  function fontPaths(layout) {
    var out = [["font.size", sizeAt(layout, "font.size")],
               ["title.font.size", sizeAt(layout, "title.font.size")],
               ["title.subtitle.font.size", sizeAt(layout, "title.subtitle.font.size")],
               ["legend.font.size", sizeAt(layout, "legend.font.size")],
               ["hoverlabel.font.size", sizeAt(layout, "hoverlabel.font.size")]];
    ["t", "b", "l"].forEach(function (side) {      /* room for the larger titles and legend */
      out.push(["margin." + side, layout.margin && layout.margin[side]]);
    });
    Object.keys(layout).forEach(function (key) {
      if (/^[xy]axis\d*$/.test(key) && layout[key]) {
        var base = key.charAt(0) + "axis";         /* the template styles every x (y) axis */
        out.push([key + ".title.font.size", sizeAt(layout, key + ".title.font.size",
                                                   base + ".title.font.size")]);
        out.push([key + ".tickfont.size", sizeAt(layout, key + ".tickfont.size",
                                                 base + ".tickfont.size")]);
      }
    });
    (layout.annotations || []).forEach(function (a, i) {
      out.push(["annotations[" + i + "].font.size", a && a.font && a.font.size]);
    });
    return out.filter(function (p) { return typeof p[1] === "number"; });
  }
  function scaleFigure(gd, on) {
    var layout = gd.layout;
    if (!window.Plotly || !layout || !gd.data || !gd.data.length) { return; }
    var size = sizeAt(layout, "font.size");
    var scaled = gd._clScaledSize !== undefined && size === gd._clScaledSize;
    if (on === scaled) { return; }
    var f = on ? SCALE : 1 / SCALE, update = {};
    fontPaths(layout).forEach(function (p) { update[p[0]] = Math.round(p[1] * f * 10) / 10; });
    if (typeof size !== "number") { update["font.size"] = Math.round(12 * f * 10) / 10; }
    gd._clScaledSize = on ? update["font.size"] : undefined;
    window.Plotly.relayout(gd, update);
  }
  function scaleAll() {
    var on = document.body.classList.contains("cl-present");
    document.querySelectorAll(".js-plotly-plot").forEach(function (gd) {
      if (on || gd._clScaledSize !== undefined) { scaleFigure(gd, on); }
    });
  }
  window.setInterval(scaleAll, 700);

  document.addEventListener("keydown", function (e) {
    if (!document.body.classList.contains("cl-present")) { return; }
    if (e.altKey || e.ctrlKey || e.metaKey || typing(e.target)) { return; }
    var step = null;
    switch (e.key) {
      case "PageDown": case "ArrowDown": case "ArrowRight": case " ": step = 1; break;
      case "PageUp": case "ArrowUp": case "ArrowLeft": step = -1; break;
      case "Home": step = "home"; break;
      case "Escape":
        var toggle = document.getElementById("present-toggle");
        if (toggle) { toggle.click(); }
        e.preventDefault();
        return;
      default: return;
    }
    if (e.shiftKey && step === 1 && e.key === " ") { step = -1; }
    e.preventDefault();
    go(step);
  });
})();
