/* Draws every element with a data-figure attribute (Plotly JSON) once plotly.js has loaded.
   Without JavaScript the tables beside each chart carry the same figures. */
(function () {
  "use strict";
  function draw() {
    if (typeof window.Plotly === "undefined") { return; }
    document.querySelectorAll("[data-figure]").forEach(function (el) {
      var fig = JSON.parse(el.getAttribute("data-figure"));
      window.Plotly.newPlot(el, fig.data, fig.layout, {responsive: true, displaylogo: false});
      el.setAttribute("data-drawn", "1");
    });
  }
  if (document.readyState === "loading") {
    document.addEventListener("DOMContentLoaded", draw);
  } else {
    draw();
  }
})();
