"""Identification layer: response maths, estimators, uncertainty, quality flags, the fit record.

It works on arrays and typed records and knows nothing of the database, the map or the
command line; batch fitting (``fitting``) is the one module that streams a store through it.
"""
