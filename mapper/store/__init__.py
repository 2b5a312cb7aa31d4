"""Storage layer: the DuckDB store, file readers, the campaign file, import and segmentation.

It knows nothing of identification methods; it keeps tests, samples and the rows other
layers hand it. Only this subpackage imports duckdb.
"""
