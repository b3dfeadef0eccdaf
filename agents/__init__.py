"""Baseline agents for needbench tasks."""
