"""Analysis: what a page or command asks of a roster, joined from the store and the statistics library.

``inputs`` reads a roster through a mapping version and a window; ``runs`` fits and records trends;
``robustness`` refits under other readings of "forced"; ``jobs`` runs bootstraps in the background;
``mapping_files`` imports and exports mappings; ``provenance`` says where every exported number came from.
New measures (rates, adjusted trends) and their runs belong here; drawing and file formats do not.
"""
