"""History queries: windows of measures, threshold sweeps and label delays."""
