"""tidegate: a release gate for incrementally retrained ranking and recommendation models."""

__version__ = "0.1.0"
