"""Analysis layer: trends against level, the operating map, comparisons, margins, tuning, verdict.

It works on records (fit rows as a table), never on the database.
"""
