"""The ipywidgets explorer."""
