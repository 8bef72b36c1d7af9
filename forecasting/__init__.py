"""Forecasting: quarter-hour rating history in, probabilistic daypart forecasts out.

A library of its own: it takes and returns DataFrames and arrays and never imports `planner`.
"""
