"""Comparison report: learners x shaping variants across seeds (statistics, tables, plots)."""
