"""Measurement core: sine fits, noise floor, rejection, capture planning (numpy only)."""
