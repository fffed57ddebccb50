"""Reading, reshaping, validating and deriving: everything before the statistics."""
