"""Planner: scenarios, deals, allocation, the book, stress tests and reports.

The command line (`pledge`) is a thin layer over the functions exported here.
"""
