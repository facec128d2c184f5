"""Shared by every side: errors, input checks, words and numbers, typed results, metrics, work over the cores."""
