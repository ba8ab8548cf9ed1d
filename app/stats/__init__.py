"""Pure statistics for Helmshift: numpy, pandas, scipy and statsmodels only.

Nothing here imports the web framework, the database layer or the plotting library; a test checks it.
"""
