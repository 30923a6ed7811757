"""Render stage: results to text, JSON and the formats CI systems read."""
