"""Pure computation: numpy, scipy and statsmodels in, frozen result dataclasses out."""
