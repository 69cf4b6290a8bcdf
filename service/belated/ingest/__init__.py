"""Validation and storage of prediction and label batches."""
