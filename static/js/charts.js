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
    if (layout.yaxis && layout.yaxis.tickmode === 'array' && layout.xaxis && layout.xaxis.type === 'log') {
      forestRows(layout);
    }
    rewrapFooter(layout);
  }
  // The source line and notes under the plot were wrapped for the desktop width: on a phone they are wrapped
  // again for it, and the bottom margin grows by the lines that adds (source at the very bottom, notes on it).
  function rewrapFooter(layout) {
    var anns = layout.annotations || [];
    var source = anns.filter(function (a) { return a.name === 'source'; })[0];
    if (!source || !layout.margin) { return; }
    var notes = anns.filter(function (a) { return a.name === 'notes'; })[0];
    var lines = function (t) { return t ? String(t).split('<br>').length : 0; };
    var before = lines(source.text) + lines(notes && notes.text);
    var sourcePx = (layout.meta && layout.meta.source_px) || 0;
    var oldLine = sourcePx && lines(source.text) ? sourcePx / lines(source.text) : 13;
    var lineH = 12;  // a 9 px note line
    source.text = wrap(String(source.text).split('<br>').join(' '), 62);
    if (notes) { notes.text = wrap(String(notes.text).split('<br>').join(' '), 62); }
    var bottom = Math.round(layout.margin.b - before * oldLine + (lines(source.text) + lines(notes && notes.text)) * lineH);
    bottom = Math.max(bottom, 40);
    if (layout.height && bottom > layout.margin.b) { layout.height += bottom - layout.margin.b; }  // the plot keeps its room
    layout.margin.b = bottom;
    source.yshift = -(layout.margin.b - 6);
    if (notes) { notes.yshift = -(layout.margin.b - 6 - lines(source.text) * lineH); }
  }
  // A forest chart (one labelled row per odds ratio, the values in a column right of the plot) has no room
  // for a label column and a value column beside the plot on a phone: each row's label goes above its
  // interval and its value under it, both inside the plot, and the log-scale ticks thin out.
  function forestRows(layout) {
    var ya = layout.yaxis, xa = layout.xaxis, oldLeft = (layout.margin && layout.margin.l) || 0, left = 12;
    var rows = [];
    (ya.tickvals || []).forEach(function (pos, i) {
      rows.push({ x: 0, xref: 'paper', xanchor: 'left', y: pos, yref: 'y', yanchor: 'bottom', yshift: 9,
        text: ya.ticktext[i], showarrow: false, align: 'left', font: { size: 11 } });
    });
    layout.annotations = (layout.annotations || []).map(function (a) {
      if (a.xref === 'paper' && a.x === 1 && a.xanchor === 'left') {  // the value column and its heading
        return Object.assign({}, a, { xanchor: 'right', xshift: 0, yanchor: a.yref === 'y' ? 'top' : 'bottom',
          yshift: a.yref === 'y' ? -9 : 0 });
      }
      if (a.name === 'source' || a.name === 'notes') {  // in line with the title again, from the new margin
        return Object.assign({}, a, { xshift: (a.xshift || 0) + (oldLeft - left) });
      }
      return a;
    }).concat(rows);
    layout.yaxis = Object.assign({}, ya, { showticklabels: false });
    if (xa.tickvals && xa.tickvals.length > 3) {
      layout.xaxis = Object.assign({}, xa, { tickvals: xa.tickvals.filter(function (_, i) { return i % 2 === 0; }) });
    }
    layout.margin = Object.assign({}, layout.margin, { l: left, r: 12 });
    var n = (ya.tickvals || []).length;
    layout.height = Math.max(layout.height || 0, layout.margin.t + layout.margin.b + 56 * n + 40);
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
