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
      if (target.clientWidth < 600) { narrow(spec.figure.layout, spec.figure.data || []); }
      window.Plotly.newPlot(target, spec.figure.data, spec.figure.layout, config).then(function () {
        target.dataset.drawn = "1";
        if (target.dataset.recordsUrl) { linkBars(target); }
        target.setAttribute('data-state', 'drawn');
      });
    });
  }
  // On a phone the figure keeps its data but not its desktop layout: the legend goes in rows above the
  // plot (instead of past the right edge), year ticks thin out so they do not overlap, the title shrinks.
  function wrap(text, width) {
    var lines = [], line = '';
    String(text).split('<br>').forEach(function (part) {
      part.split(' ').forEach(function (word) {
        if (line && (line + ' ' + word).length > width) { lines.push(line); line = word; }
        else { line = line ? line + ' ' + word : word; }
      });
      lines.push(line); line = '';
    });
    return lines.join('<br>');
  }
  function narrow(layout, data) {
    // legend rows (one per named trace: long names do not share a row at this width) and title lines
    // decide how much room the top margin needs, so neither runs into the plot nor into each other
    var legendRows = data.filter(function (t) { return t.showlegend !== false && t.name; }).length;
    var titleLines = 0;
    layout.legend = Object.assign({}, layout.legend || {}, { orientation: 'h', x: 0, xanchor: 'left', y: 1.02,
      yanchor: 'bottom', font: { size: 11 } });
    if (layout.xaxis) { layout.xaxis = Object.assign({}, layout.xaxis, { nticks: 6, tickangle: 0, tickmode: 'auto' }); }
    if (layout.title && layout.title.text) {
      var text = wrap(layout.title.text, 42);
      titleLines = text.split('<br>').length;
      layout.title = Object.assign({}, layout.title, { text: text, y: 0.99, yanchor: 'top', yref: 'container',
        font: Object.assign({}, layout.title.font || {}, { size: 13 }) });
    }
    var top = 16 + 18 * titleLines + 21 * legendRows;
    layout.margin = Object.assign({}, layout.margin || {}, { r: 12, t: top });
    // the plot keeps about 260 px of its own however much the title and legend take
    layout.height = Math.max(layout.height || 0, 360, top + 320);
    layout.autosize = true;
    if (layout.annotations) {
      layout.annotations = layout.annotations.map(function (a) {
        // the source lines keep their line breaks (wrapping them would run them into each other)
        return Object.assign({}, a, { font: Object.assign({}, a.font || {}, { size: 9 }) });
      });
    }
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
