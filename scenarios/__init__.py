"""Scenario files shipped with pkcalc (invented demo data and reference cases)."""
