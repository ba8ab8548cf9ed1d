// Draws every figure handed to the page as JSON (<script type="application/json" data-figure-for=ID>).
// Kept tiny on purpose: the figures themselves are built on the server by app/charts.py.
(function () {
  function draw() {
    if (!window.Plotly) { return; }
    document.querySelectorAll('script[type="application/json"][data-figure-for]').forEach(function (node) {
      var target = document.getElementById(node.getAttribute('data-figure-for'));
      if (!target || target.dataset.drawn) { return; }
      var spec = JSON.parse(node.textContent);
      var config = spec.config || { displaylogo: false, responsive: true };
      window.Plotly.newPlot(target, spec.figure.data, spec.figure.layout, config).then(function () {
        target.dataset.drawn = "1";
        if (target.dataset.recordsUrl) { linkBars(target); }
        target.setAttribute('data-state', 'drawn');
      });
    });
  }
  // A bar of a chart with data-records-url opens the departures behind it: its year, and its category when
  // the trace is one (trace names start with the category: "Forced", "Excluded (not counted)", ...).
  var CATEGORIES = ['forced', 'voluntary', 'excluded', 'unmapped'];
  function linkBars(target) {
    target.on('plotly_click', function (event) {
      var point = event.points && event.points[0];
      if (!point || point.data.type !== 'bar') { return; }
      var url = new URL(target.dataset.recordsUrl, window.location.href);
      url.searchParams.set('year', String(point.x));
      var first = String(point.data.name || '').split(' ')[0].toLowerCase();
      if (CATEGORIES.indexOf(first) >= 0) { url.searchParams.set('category', first); }
      window.location.assign(url.toString());
    });
    target.style.cursor = 'pointer';
  }
  document.addEventListener('DOMContentLoaded', draw);
  document.addEventListener('htmx:afterSettle', draw);
})();
