"""belated: monitoring for classifiers whose labels arrive late."""

__version__ = "0.1.0"
