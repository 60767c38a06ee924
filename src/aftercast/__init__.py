"""aftercast: watch live forecasts against what actually happens."""

__version__ = "0.1.0"
