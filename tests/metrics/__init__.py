"""Windows, measures, thresholds and delays through the API, checked against scikit-learn."""
