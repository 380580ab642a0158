"""Analytics: false alarms per home-month, detection on staged events and the weekly summary.

Only `load` reads the database; the other modules are pure functions over arrays and frames.
"""
