"""Briefing: figures in the house look and the files an analyst hands on (PNG/SVG/PDF charts, deck, brief).

``charts`` draws plotly figures; ``findings`` builds each finding's figure once for page and export;
``render`` turns figures into static files through one kaleido engine; ``deck`` and ``brief`` assemble the
.pptx and the PDF; ``exports`` is what the Briefing page and ``helmshift export`` call.
"""
