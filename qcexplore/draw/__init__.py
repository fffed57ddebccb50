"""Bokeh figures built from results: pure functions, no statistics, no state."""
