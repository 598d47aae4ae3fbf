"""What the loop decides, as records on disk: run logs, trip logs (fsynced, crash-safe readers),
run names, end records and the words and units of each rule's signal.
"""
