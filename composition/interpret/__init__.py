"""Interpret: head profiles, model-space scores, compensation predictions, the shortlist, one pair in depth."""
