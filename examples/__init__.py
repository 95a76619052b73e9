"""Worked examples of user theories and user data models (see README.md)."""
