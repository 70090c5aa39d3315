"""What every stage may use and that imports no stage: random streams and JSON conversion.

Nothing here knows about exposure, strata or outcomes beyond plain arrays.
"""
