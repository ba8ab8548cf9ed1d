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
        target.setAttribute('data-state', 'drawn');
      });
    });
  }
  document.addEventListener('DOMContentLoaded', draw);
  document.addEventListener('htmx:afterSettle', draw);
})();
