"""Presentation: plots, tables, JSON and HTML. Never computes physics."""
