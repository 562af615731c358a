/* Draws every element with a data-figure attribute (Plotly JSON) once plotly.js has loaded.
   Without JavaScript the tables beside each chart carry the same figures. */
(function () {
  "use strict";
  /* German dates, numbers and modebar words for plotly.js (the figures' own words are
     translated by the server, web/chart_words.py). */
  var GERMAN = {
    moduleType: "locale", name: "de",
    dictionary: {
      "Download plot as a png": "Als PNG speichern", "Download plot as a PNG": "Als PNG speichern",
      "Download plot": "Grafik speichern", "Share chart...": "Grafik teilen …", "Zoom": "Zoomen",
      "Pan": "Verschieben", "Zoom in": "Vergrößern", "Zoom out": "Verkleinern",
      "Autoscale": "Automatisch skalieren", "Reset axes": "Achsen zurücksetzen",
      "Box Select": "Rechteckauswahl", "Lasso Select": "Lassoauswahl",
      "Double-click to zoom back out": "Doppelklick zum Herauszoomen"
    },
    format: {
      days: ["Sonntag", "Montag", "Dienstag", "Mittwoch", "Donnerstag", "Freitag", "Samstag"],
      shortDays: ["So", "Mo", "Di", "Mi", "Do", "Fr", "Sa"],
      months: ["Januar", "Februar", "März", "April", "Mai", "Juni", "Juli", "August",
               "September", "Oktober", "November", "Dezember"],
      shortMonths: ["Jan", "Feb", "Mär", "Apr", "Mai", "Jun", "Jul", "Aug", "Sep", "Okt",
                    "Nov", "Dez"],
      date: "%d.%m.%Y", decimal: ",", thousands: "\u202f"
    }
  };
  function draw() {
    if (typeof window.Plotly === "undefined") { return; }
    var lang = document.documentElement.lang || "en";
    if (lang === "de") { window.Plotly.register(GERMAN); }
    document.querySelectorAll("[data-figure]").forEach(function (el) {
      var fig;
      try { fig = JSON.parse(el.getAttribute("data-figure")); } catch (e) { return; }
      if (!fig || !fig.data) { return; }
      window.Plotly.newPlot(el, fig.data, fig.layout,
                            {responsive: true, displaylogo: false, locale: lang});
      el.setAttribute("data-drawn", "1");
    });
  }
  if (document.readyState === "loading") {
    document.addEventListener("DOMContentLoaded", draw);
  } else {
    draw();
  }
})();
