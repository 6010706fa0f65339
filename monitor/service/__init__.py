"""The running service: the `Monitor` loop and what it needs around it (capture, sd_notify, signals)."""
