"""Compose: factored writer -> responder token matrices for every side and query part (docs/methods.md §3, §3b)."""
