"""For the reviewer: trip plots, CSV and COMTRADE exports, trip filters and summaries, replay of
a recorded run, and the per-run HTML report.
"""
