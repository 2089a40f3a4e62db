"""kilter service half: manifest contract, grid, scoring, alert rule, thresholds, HTTP API.

Nothing in this package imports torch (tests/unit/test_no_torch.py proves it).
"""
