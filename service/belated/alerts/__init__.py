"""Rules, their evaluation, the alert lifecycle and signed webhook delivery."""
