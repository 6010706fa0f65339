"""Judging values: level machines for bands and health checks, learned baselines."""
